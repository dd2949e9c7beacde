"""The desktop-Excel workbook: xlwings' template with its VBA, the xlwings.conf sheet, importable UDF modules."""
from __future__ import annotations

import importlib
import json
import subprocess
import sys
import textwrap
import zipfile

import openpyxl
import pytest

from layerwise.addin import excel_setup
from layerwise.addin.functions import FUNCTIONS
from layerwise.addin.recalc import recalculate

MODULES = ["layerwise.addin.functions", "layerwise.addin.capital_functions"]


def _conf_as_xlwings_reads_it(ws) -> dict:
    """xlwings' VBA GetConfigFromSheet: A1 down to the last filled cell before a gap, keys upper-cased."""
    out, r = {}, 1
    while ws.cell(r, 1).value not in (None, ""):
        out[str(ws.cell(r, 1).value).upper()] = ws.cell(r, 2).value
        r += 1
    return out


@pytest.fixture(scope="module")
def workbook(tmp_path_factory):
    return excel_setup.write_excel_workbook(tmp_path_factory.mktemp("excel") / "layerwise.xlsm")


def test_udf_modules_import_and_define_every_function_once():
    assert list(excel_setup.UDF_MODULES) == MODULES
    for name in MODULES:
        importlib.import_module(name)
    found = excel_setup.functions_by_module()
    names = [n for ns in found.values() for n in ns]
    assert sorted(names) == sorted(FUNCTIONS)  # every published function, none twice
    for module, ns in found.items():
        for n in ns:
            assert FUNCTIONS[n].__module__ == module


def test_workbook_keeps_xlwings_template_and_its_vba(workbook):
    wb = openpyxl.load_workbook(workbook, keep_vba=True)
    assert wb.vba_archive is not None
    template = excel_setup.template_path()
    with zipfile.ZipFile(workbook) as z, zipfile.ZipFile(template) as t:
        assert z.read("xl/vbaProject.bin") == t.read("xl/vbaProject.bin")
        assert b"application/vnd.ms-excel.sheet.macroEnabled.main+xml" in z.read("[Content_Types].xml")
        assert b"vbaProject" in z.read("xl/_rels/workbook.xml.rels")
        assert b'codeName="ThisWorkbook"' in z.read("xl/workbook.xml")
    assert wb.sheetnames == ["layerwise", "xlwings.conf", "Examples"]


def test_conf_sheet_names_the_udf_modules(workbook):
    wb = openpyxl.load_workbook(workbook, keep_vba=True)
    assert "_xlwings.conf" not in wb.sheetnames  # renamed: that activates it
    assert not any(s.endswith(".py") for s in wb.sheetnames)  # xlwings would take such sheets for code
    conf = _conf_as_xlwings_reads_it(wb["xlwings.conf"])
    assert conf == {"UDF MODULES": ";".join(MODULES)}  # nothing else overrides the add-in's settings
    for name in conf["UDF MODULES"].split(";"):
        assert importlib.import_module(name)


def test_settings_given_are_written_in_the_templates_order(tmp_path):
    path = excel_setup.write_excel_workbook(
        tmp_path / "b.xlsm", interpreter=r"C:\envs\lw\Scripts\pythonw.exe", conda_env="lw", use_udf_server=True,
        examples=False,
    )
    wb = openpyxl.load_workbook(path, keep_vba=True)
    ws = wb["xlwings.conf"]
    assert [ws.cell(r, 1).value for r in range(1, 5)] == ["Interpreter_Win", "Conda Env", "UDF Modules", "Use UDF Server"]
    conf = _conf_as_xlwings_reads_it(ws)
    assert conf["INTERPRETER_WIN"] == r"C:\envs\lw\Scripts\pythonw.exe" and conf["USE UDF SERVER"] is True
    assert wb.sheetnames == ["layerwise", "xlwings.conf"]


def test_standalone_template(tmp_path):
    path = excel_setup.write_excel_workbook(tmp_path / "s.xlsm", standalone=True)
    with zipfile.ZipFile(path) as z, zipfile.ZipFile(excel_setup.template_path(standalone=True)) as t:
        assert z.read("xl/vbaProject.bin") == t.read("xl/vbaProject.bin")
    wb = openpyxl.load_workbook(path, keep_vba=True)
    assert _conf_as_xlwings_reads_it(wb["xlwings.conf"])["UDF MODULES"] == ";".join(MODULES)


def test_bad_requests_are_refused(tmp_path):
    with pytest.raises(ValueError, match=".xlsm"):
        excel_setup.write_excel_workbook(tmp_path / "b.xlsx")
    with pytest.raises(ValueError, match="not a module name"):
        excel_setup.write_excel_workbook(tmp_path / "b.xlsm", udf_modules=["layerwise.addin.functions;x"])
    with pytest.raises(ValueError, match="none of the UDF modules"):
        excel_setup.write_excel_workbook(tmp_path / "b.xlsm", udf_modules=["layerwise.addin.functions"])
    with pytest.raises(ValueError, match="double quote"):
        excel_setup.write_excel_workbook(tmp_path / "b.xlsm", interpreter='C:\\a "b"')


def test_workbook_formulas_give_values_headless(workbook, tmp_path):
    run = recalculate(workbook, tmp_path / "priced.xlsm", functions=FUNCTIONS)
    v = {k: x for k, x in run.values.items() if k.startswith("layerwise!")}
    assert v["layerwise!B6"].startswith("freqsev(")
    assert v["layerwise!B11"] == pytest.approx(FUNCTIONS["LW_PREMIUM"](v["layerwise!B6"], 5e6, 10e6, "wang 0.4"), rel=1e-12)
    assert 0 < v["layerwise!B10"] < v["layerwise!B11"]
    assert not run.errors
    assert openpyxl.load_workbook(tmp_path / "priced.xlsm", keep_vba=True).vba_archive is not None


def test_xlwings_conf_file_reads_back_with_xlwings_parser(tmp_path, monkeypatch):
    import xlwings
    import xlwings.utils

    path = excel_setup.write_xlwings_conf(tmp_path, interpreter=r"C:\envs\lw\Scripts\python.exe", show_console=False)
    assert path.name == "xlwings.conf"
    monkeypatch.setattr(xlwings, "USER_CONFIG_FILE", str(path))
    conf = xlwings.utils.read_user_config()
    assert conf == {"interpreter_win": r"C:\envs\lw\Scripts\python.exe", "udf modules": ";".join(MODULES),
                    "show console": "False"}


VBA_CHILD = textwrap.dedent(
    r'''
    import importlib, io, json, sys, types
    # xlwings.udfs imports Windows-only modules at the top; stand-ins let its VBA writer run here
    for name in ("pythoncom", "pywintypes", "win32com", "win32com.client"):
        sys.modules[name] = types.ModuleType(name)
    sys.modules["pythoncom"].CoInitialize = lambda: None
    sys.modules["pywintypes"].com_error = Exception
    sys.modules["win32com.client"].Dispatch = lambda *a, **k: None
    import xlwings.udfs as udfs

    class Workbook:
        Name = "layerwise.xlsm"

    out = {}
    for name in MODULES:
        buf = io.StringIO()
        udfs.generate_vba_wrapper(name, importlib.import_module(name), buf, Workbook())
        out[name] = buf.getvalue()
    print(json.dumps(out))
    '''
)


def test_xlwings_writes_one_vba_function_per_published_function():
    code = f"MODULES = {MODULES!r}\n" + VBA_CHILD
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    if done.returncode != 0 and "xlwings.udfs" in done.stderr and "ModuleNotFoundError" in done.stderr:
        pytest.skip(f"xlwings.udfs needs more Windows modules than stubbed: {done.stderr[-300:]}")
    assert done.returncode == 0, done.stderr[-2000:]
    vba = json.loads(done.stdout.strip().splitlines()[-1])
    seen = []
    for module, text in vba.items():
        for line in text.splitlines():
            if line.startswith("Function "):
                name = line[len("Function "):line.index("(")]
                seen.append(name)
                f = FUNCTIONS[name]
                assert f.__module__ == module
                args = line[line.index("(") + 1: line.rindex(")")]
                want = ", ".join(("Optional " if "optional" in a else "") + a["name"] for a in f.__xlfunc__["args"])
                assert args == want, (name, args, want)
                assert f'XLPy.CallUDF("{module}", "{name}"' in text
        assert text.count("Application.Volatile") == sum(
            1 for n, f in FUNCTIONS.items() if f.__module__ == module and f.__xlfunc__["volatile"])
    assert sorted(seen) == sorted(FUNCTIONS)


def test_excel_main_writes_workbook_or_conf(tmp_path, capsys):
    assert excel_setup.excel_main([str(tmp_path / "w.xlsm"), "--no-examples"]) == 0
    assert openpyxl.load_workbook(tmp_path / "w.xlsm", keep_vba=True).sheetnames == ["layerwise", "xlwings.conf"]
    assert excel_setup.excel_main([str(tmp_path / "x.conf"), "--conf", "--conda-env", "lw"]) == 0
    assert '"CONDA ENV","lw"' in (tmp_path / "x.conf").read_text()
    printed = capsys.readouterr().out.split()
    assert printed == [str(tmp_path / "w.xlsm"), str(tmp_path / "x.conf")]
