"""One-file export: runs in a CPython where layerwise (and xlwings) cannot be imported, gives the package's values."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy
import pandas
import pytest
import scipy

from layerwise.addin import export
from layerwise.addin.functions import FUNCTIONS, describe_functions

MODEL = "freqsev(poisson 5, lognormal 2e6 2.5)"
LOSSES = [0.0, 1.5e6, 3e5, 7.2e6, 2.5e6, 0.0, 1.1e7, 4e5, 9e5, 6e6]

# Calls made in both processes: (label, function name, arguments).
CALLS = [
    ("premium", "LW_PREMIUM", [MODEL, 5e6, 10e6, "wang 0.4"]),
    ("premium_share", "LW_PREMIUM", [MODEL, 5e6, 10e6, "ph 0.8", 0.5, None, 2.0]),
    ("expected_loss", "LW_EXPECTED_LOSS", [MODEL, 5e6, 10e6]),
    ("yearloss", "LW_MODEL_YEARLOSS", [[[x] for x in LOSSES]]),
    ("distortion", "LW_DISTORTION", ["wang", 0.4]),
    ("g", "LW_DISTORTION_VALUE", ["tvar 0.9", [[0.01], [0.5]]]),
    ("tower", "LW_TOWER", [MODEL, 0.0, [[1e6], [4e6], ["unlimited"]], "wang 0.3", None, None, None, None, "layer, premium"]),
    ("bad_limit", "LW_PREMIUM", [MODEL, 1e6, -5.0, "wang 0.4"]),
    ("portfolio", "LW_PORTFOLIO", [MODEL, "wang 0.4", "var", 0.99]),
]
# Calls on the year loss table's reference (a content hash: the same in both processes).
YLT_CALLS = [
    ("ylt_el", "LW_EXPECTED_LOSS", [1e6, 5e6]),
    ("ylt_premium", "LW_PREMIUM", [1e6, 5e6, "ph 0.7"]),
]

CHILD = textwrap.dedent(
    r'''
    import importlib.abc, importlib.util, json, runpy, sys
    sys.path[:] = PATHS
    assert importlib.util.find_spec("layerwise") is None, "layerwise is importable before the file runs"

    class NoXlwings(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path=None, target=None):
            if name == "xlwings" or name.startswith("xlwings."):
                raise ImportError("xlwings is blocked in this test")

    sys.meta_path.insert(0, NoXlwings())
    ns = runpy.run_path(FILE)
    out = {}
    for label, name, args in CALLS:
        out[label] = ns[name](*args)
    for label, name, args in YLT_CALLS:
        out[label] = ns[name](out["yearloss"], *args)
    again = runpy.run_path(FILE)  # a second run reuses the modules
    out["same_module"] = again["LW_PREMIUM"] is ns["LW_PREMIUM"]
    import layerwise.engine.models as m, inspect
    out["models_file"] = m.__file__
    out["source_line"] = inspect.getsource(m.YearLossTable).splitlines()[0]
    out["xlwings_loaded"] = "xlwings" in sys.modules
    out["names"] = sorted(ns["FUNCTIONS"])
    out["described"] = [d["name"] for d in ns["describe_functions"]()]
    out["top_level"] = sorted(k for k in ns if k.startswith("LW_"))
    print(json.dumps(out))
    '''
)


def _dependency_paths(tmp_path: Path) -> list[str]:
    """sys.path entries with numpy, scipy and pandas (and the standard library) but not layerwise.

    The site-packages folders holding numpy, scipy and pandas may also hold layerwise (a regular
    install) or its editable-install hooks, so their entries are linked into a folder of their own,
    leaving out layerwise's; the child runs without site, so no .pth hooks run either.
    """
    deps = tmp_path / "deps"
    deps.mkdir()
    for site in {Path(mod.__file__).resolve().parents[1] for mod in (numpy, scipy, pandas)}:
        for entry in site.iterdir():
            name = entry.name.lower()
            if name.startswith(("layerwise", "__editable__")) or name.endswith(".pth") or (deps / entry.name).exists():
                continue
            (deps / entry.name).symlink_to(entry, target_is_directory=entry.is_dir())
    stdlib = [p for p in sys.path if p and Path(p).is_dir() and "site-packages" not in p and "dist-packages" not in p
              and Path(p).resolve() != Path.cwd().resolve()]
    return stdlib + [str(deps)]


def _run_child(path: Path, tmp_path: Path) -> dict:
    code = f"PATHS = {_dependency_paths(tmp_path)!r}\nFILE = {str(path)!r}\nCALLS = {CALLS!r}\nYLT_CALLS = {YLT_CALLS!r}\n" + CHILD
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin"), "PYTHONHASHSEED": "0"}
    # -I: no environment variables, no user site, no script folder; -S: no site, so no .pth hooks (the
    # editable install of layerwise is one), whatever the sys.path built above holds
    done = subprocess.run([sys.executable, "-I", "-S", "-c", code], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("export")
    path = export.write_single_file(tmp / "layerwise_functions.py")
    return path, _run_child(path, tmp)


def _same(a, b):
    if isinstance(a, float) and isinstance(b, float):
        return a == pytest.approx(b, rel=1e-12, abs=1e-9)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


def test_exported_file_gives_the_installed_package_values(exported):
    _, got = exported
    want = {label: FUNCTIONS[name](*args) for label, name, args in CALLS}
    want.update({label: FUNCTIONS[name](want["yearloss"], *args) for label, name, args in YLT_CALLS})
    for label in want:
        w, g = json.loads(json.dumps(want[label])), got[label]  # through JSON like the child's
        assert _same(g, w), (label, g, w)
    assert isinstance(got["premium"], float) and got["premium"] > got["expected_loss"] > 0
    assert got["yearloss"].startswith("yearloss#")
    assert got["bad_limit"].startswith("#VALUE! LW_PREMIUM(limit):")
    assert got["tower"][0] == ["layer", "premium"] and len(got["tower"]) == 4


def test_exported_file_publishes_every_function_without_xlwings(exported):
    _, got = exported
    assert got["xlwings_loaded"] is False
    assert got["names"] == sorted(FUNCTIONS) == got["top_level"]
    assert got["described"] == [d["name"] for d in describe_functions()]
    assert got["same_module"] is True
    assert got["models_file"] == "<layerwise bundle>/layerwise/engine/models.py"
    assert got["source_line"].startswith("@dataclass")


def test_bundle_holds_the_engine_and_the_cell_functions_only():
    mods = export.bundle_modules()
    engine_files = {p.stem for p in Path(export._spec("layerwise.engine").origin).parent.glob("*.py")}
    for stem in engine_files - {"__init__"}:
        assert f"layerwise.engine.{stem}" in mods
    for name in ("layerwise", "layerwise.engine", "layerwise.addin", "layerwise.addin.functions",
                 "layerwise.addin.cells", "layerwise.addin.handles"):
        assert name in mods
    for name in ("layerwise.addin.recalc", "layerwise.addin.charts", "layerwise.addin.export", "layerwise.addin.cli"):
        assert name not in mods
    for name in {f.__module__ for f in FUNCTIONS.values()}:
        assert name in mods  # wherever a published function lives (e.g. capital_functions)
    for name, (source, is_package) in mods.items():
        assert is_package == (name in ("layerwise", "layerwise.engine", "layerwise.addin"))


def test_render_is_deterministic_and_exact(tmp_path):
    text = export.render_single_file()
    assert text == export.render_single_file()
    compile(text, "layerwise_functions.py", "exec")
    assert export._literal("a'''b\"\"\"c\\") != "" and eval(export._literal("a'''b\"\"\"c\\")) == "a'''b\"\"\"c\\"
    for s in ["x\\", "'''", 'say "hi"\n', "tab\t\\n\n", "end'"]:
        assert eval(export._literal(s)) == s
    # a folder (existing or written with a trailing slash) gets the default file name
    assert export.write_single_file(tmp_path).name == "layerwise_functions.py"
    assert export.write_single_file(str(tmp_path / "sub") + os.sep) == tmp_path / "sub" / "layerwise_functions.py"


def test_running_the_file_where_layerwise_is_installed_warns_and_uses_it(tmp_path):
    import runpy

    path = export.write_single_file(tmp_path / "lw.py")
    before = list(sys.meta_path)
    with pytest.warns(RuntimeWarning, match="already imported"):
        ns = runpy.run_path(str(path))
    assert ns["LW_PREMIUM"] is FUNCTIONS["LW_PREMIUM"]
    assert sys.meta_path == before


def test_export_main_writes_and_prints(tmp_path, capsys):
    assert export.export_main([str(tmp_path / "out.py")]) == 0
    printed = capsys.readouterr().out.strip()
    assert Path(printed) == tmp_path / "out.py" and Path(printed).stat().st_size > 10_000
