"""No data lost: headless recalculation never touches its input, writes the priced copy atomically, and
a failure at any point leaves the input (and any earlier priced copy) as it was, naming the cell and why.
"""
from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import textwrap
import time
import zipfile
from pathlib import Path

import openpyxl
import pytest
from openpyxl.worksheet.formula import ArrayFormula

from layerwise.addin import cells, functions, xlsx_values
from layerwise.addin.functions import FUNCTIONS
from layerwise.addin.recalc import RecalcError, recalculate

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.errors.GridWarning")


def digest(path: Path) -> tuple[str, int]:
    """Content hash and modification time: both must stay as they were."""
    return hashlib.sha256(path.read_bytes()).hexdigest(), os.stat(path).st_mtime_ns


def scale(x, k):
    return x * k


def boom(x):
    raise RuntimeError(f"pricing engine exploded on {x:g}")


def toy_book(path: Path, failing: bool = False) -> Path:
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Inputs"
    ws["A1"] = 3.0
    ws["B1"] = "=SCALE(A1, 2)"
    calc = wb.create_sheet("Calc")
    calc["A1"] = "=Inputs!B1 + 1"
    calc["C7"] = "=BOOM(A1)" if failing else "=SCALE(A1, 10)"
    calc["D1"] = "=C7 * 2"
    wb.save(path)
    return path


def pricing_book(path: Path) -> Path:
    """A small pricing sheet with the published functions, one of its inputs bad."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Tower"
    ws["A1"], ws["B1"] = "frequency", "poisson 2"
    ws["A2"], ws["B2"] = "severity", "lognormal 1e6 1.5"
    ws["B3"] = "=LW_MODEL_FREQSEV(B1, B2)"
    ws["A5"], ws["B5"], ws["C5"] = 1e6, 2e6, "=LW_PREMIUM($B$3, A5, B5, \"wang 0.3\")"
    ws["A6"], ws["B6"], ws["C6"] = 3e6, -5.0, "=LW_PREMIUM($B$3, A6, B6, \"wang 0.3\")"  # a negative limit
    ws["D5"] = "=LW_EXPECTED_LOSS($B$3, A5, B5)"
    ws["F1"] = ArrayFormula("F1:G3", "=LW_TOWER(B3, 0, B5, \"ph 0.8\", , , , , \"premium, rate_on_line\")")
    wb.save(path)
    return path


# ----------------------------------------------------------------------------- the input is never touched
def test_success_leaves_the_input_byte_for_byte(tmp_path):
    src = toy_book(tmp_path / "book.xlsx")
    before = digest(src)
    result = recalculate(src, functions={"SCALE": scale})
    assert digest(src) == before
    assert result.target == tmp_path / "book.priced.xlsx" and result.target.exists()
    assert zipfile.ZipFile(result.target).testzip() is None
    # the priced copy can be priced again: its own copy goes elsewhere, it is not overwritten either
    copy_before = digest(result.target)
    again = recalculate(result.target, functions={"SCALE": scale})
    assert again.target.name == "book.priced.priced.xlsx" and digest(result.target) == copy_before


def test_the_input_is_refused_as_target_however_it_is_spelled(tmp_path):
    src = toy_book(tmp_path / "book.xlsx")
    before = digest(src)
    (tmp_path / "sub").mkdir()
    link = tmp_path / "link.xlsx"
    link.symlink_to(src)
    hard = tmp_path / "hard.xlsx"
    os.link(src, hard)
    spellings = [src, str(src), tmp_path / "sub" / ".." / "book.xlsx", link, hard]
    cwd = os.getcwd()
    try:
        os.chdir(tmp_path)
        spellings.append(Path("book.xlsx"))
        for target in spellings:
            with pytest.raises(RecalcError, match="never overwritten"):
                recalculate(src, target, functions={"SCALE": scale})
        with pytest.raises(RecalcError, match="never overwritten"):
            recalculate(link, src, functions={"SCALE": scale})
    finally:
        os.chdir(cwd)
    assert digest(src) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["book.xlsx", "hard.xlsx", "link.xlsx", "sub"]


# ----------------------------------------------------------------------------- atomic write
def test_the_copy_is_written_to_a_temporary_file_beside_it_then_renamed(tmp_path, monkeypatch):
    src = toy_book(tmp_path / "book.xlsx")
    target = tmp_path / "out.xlsx"
    target.write_bytes(b"the previous priced copy")
    seen = {}
    real_replace, real_fsync = os.replace, os.fsync

    def replace(a, b):
        a, b = Path(a), Path(b)
        seen["replace"] = (a, b)
        # at the moment of the rename: the new copy is complete, the old one still in place
        assert a.parent == b.parent == tmp_path and a.name.startswith(".out.xlsx.") and a.suffix == ".tmp"
        assert zipfile.ZipFile(a).testzip() is None
        assert b.read_bytes() == b"the previous priced copy"
        assert seen.get("fsync"), "the temporary file is flushed to disk before it replaces the target"
        return real_replace(a, b)

    def fsync(fd):
        seen["fsync"] = True
        if "replace" in seen:
            seen["folder_synced"] = True  # after the rename: the folder entry is flushed too
        return real_fsync(fd)

    monkeypatch.setattr(xlsx_values.os, "replace", replace)
    monkeypatch.setattr(xlsx_values.os, "fsync", fsync)
    recalculate(src, target, functions={"SCALE": scale})
    assert seen["replace"][1] == target
    if os.name == "posix":
        assert seen.get("folder_synced")
    assert zipfile.ZipFile(target).testzip() is None
    assert sorted(p.name for p in tmp_path.iterdir()) == ["book.xlsx", "out.xlsx"]


@pytest.mark.parametrize("where", ["patch", "write", "replace"])
def test_a_failure_while_writing_loses_nothing(tmp_path, monkeypatch, where):
    src = toy_book(tmp_path / "book.xlsx")
    target = tmp_path / "out.xlsx"
    target.write_bytes(b"the previous priced copy")
    before = digest(src)

    def fail(*args, **kwargs):
        raise OSError(28, "No space left on device")

    if where == "patch":  # midway through the zip: some parts written, then the disk fills up
        real = xlsx_values.patch_sheet_xml
        calls = []

        def patch(*args, **kwargs):
            calls.append(1)
            if len(calls) > 1:
                fail()
            return real(*args, **kwargs)

        monkeypatch.setattr(xlsx_values, "patch_sheet_xml", patch)
    elif where == "write":
        monkeypatch.setattr("layerwise.addin.recalc.write_values", fail)
    else:
        monkeypatch.setattr(xlsx_values.os, "replace", fail)
    with pytest.raises(RecalcError) as err:
        recalculate(src, target, functions={"SCALE": scale})
    assert f"could not write {target}" in str(err.value) and "No space left" in str(err.value)
    assert digest(src) == before
    assert target.read_bytes() == b"the previous priced copy"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["book.xlsx", "out.xlsx"]  # no temporary left


def test_a_process_killed_while_writing_leaves_input_and_previous_copy_intact(tmp_path):
    src = toy_book(tmp_path / "book.xlsx")
    target = tmp_path / "out.xlsx"
    target.write_bytes(b"the previous priced copy")
    before = digest(src)
    flag = tmp_path / "writing"
    script = textwrap.dedent(f"""
        import time
        from pathlib import Path
        from layerwise.addin import xlsx_values
        from layerwise.addin.recalc import recalculate
        real = xlsx_values.patch_sheet_xml
        def slow(*args, **kwargs):
            Path({str(flag)!r}).touch()
            time.sleep(60)  # killed here, halfway through writing the copy
            return real(*args, **kwargs)
        xlsx_values.patch_sheet_xml = slow
        recalculate({str(src)!r}, {str(target)!r}, functions={{"SCALE": lambda x, k: x * k}})
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 120
        while not flag.exists():
            assert proc.poll() is None, proc.communicate()[1].decode()[-2000:]
            assert time.monotonic() < deadline, "the recalculation never started writing"
            time.sleep(0.05)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    assert digest(src) == before
    assert target.read_bytes() == b"the previous priced copy"
    # at most a hidden temporary file remains, never a half-written target
    leftovers = [p.name for p in tmp_path.iterdir() if p.name not in ("book.xlsx", "out.xlsx", "writing")]
    assert all(n.startswith(".out.xlsx.") and n.endswith(".tmp") for n in leftovers), leftovers
    # and the next run succeeds and replaces the copy
    recalculate(src, target, functions={"SCALE": scale})
    assert zipfile.ZipFile(target).testzip() is None


# ----------------------------------------------------------------------------- failures name the cell
def test_a_failing_cell_is_named_with_its_reason_and_nothing_is_written(tmp_path):
    src = toy_book(tmp_path / "book.xlsx", failing=True)
    before = digest(src)
    with pytest.raises(RecalcError) as err:
        recalculate(src, functions={"SCALE": scale, "BOOM": boom})
    message = str(err.value)
    assert "Calc!C7" in message and "BOOM" in message and "pricing engine exploded on 7" in message
    assert digest(src) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["book.xlsx"]


def test_bad_input_in_a_pricing_sheet_is_an_error_value_in_its_cell_not_a_lost_run(tmp_path):
    src = pricing_book(tmp_path / "tower.xlsx")
    before = digest(src)
    result = recalculate(src, functions=FUNCTIONS)
    assert digest(src) == before
    good = result.values["Tower!C5"]
    assert isinstance(good, float) and good > result.values["Tower!D5"] > 0
    bad = result.values["Tower!C6"]
    info = cells.parse_error(bad)
    assert (info.code, info.function, info.argument) == ("#VALUE!", "LW_PREMIUM", "limit") and "-5" in info.message
    assert result.values["Tower!F1"] == "premium" and isinstance(result.values["Tower!F2"], float)
    saved = openpyxl.load_workbook(result.target, data_only=True)["Tower"]
    assert saved["C5"].value == good and saved["C6"].value == bad
    formulas_kept = openpyxl.load_workbook(result.target)["Tower"]
    assert str(formulas_kept["C6"].value).startswith("=LW_PREMIUM(")


def test_an_engine_failure_inside_a_function_is_contained_in_its_cell(tmp_path, monkeypatch):
    src = pricing_book(tmp_path / "tower.xlsx")

    def broken(*args, **kwargs):
        raise MemoryError("out of memory while pricing")

    monkeypatch.setattr(functions, "price_layers", broken)
    result = recalculate(src, functions=FUNCTIONS)
    info = cells.parse_error(result.values["Tower!C5"])
    assert (info.function, info.argument) == ("LW_PREMIUM", "internal") and "out of memory" in info.message
    assert cells.parse_error(result.values["Tower!C6"]).argument == "limit"  # bad input still reported as such
    assert result.target.exists()


def test_an_omitted_argument_means_the_default_as_in_excel(tmp_path):
    """F(a,,b) must mean what an empty cell means (xlwings passes None in Excel), never a silent 0:
    omitted reinstatements are unlimited, not zero; omitted shares are 100%, not an error."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws["A1"] = "=LW_MODEL_FREQSEV(\"poisson 2\", \"lognormal 1e6 1.5\")"
    ws["B1"] = "=LW_PREMIUM(A1, 1000000, 2000000, \"wang 0.3\", , , , 500000)"  # reinstatements omitted
    ws["B2"] = "=LW_PREMIUM(A1, 1000000, 2000000, \"wang 0.3\", Z1, Z1, Z1, 500000)"  # the same cells left empty
    ws["B3"] = "=LW_PREMIUM(A1, 1000000, 2000000, \"wang 0.3\", 1, \"occurrence\", 0, 500000)"  # zero reinstatements
    ws["B4"] = "=IF(TRUE,,3)"  # Excel's own functions still see 0
    path = tmp_path / "omitted.xlsx"
    wb.save(path)
    v = recalculate(path, functions=FUNCTIONS).values
    assert isinstance(v["Sheet!B1"], float) and v["Sheet!B1"] == v["Sheet!B2"]
    assert v["Sheet!B3"] < v["Sheet!B1"]  # zero reinstatements pay less: a different contract
    assert v["Sheet!B4"] == 0
