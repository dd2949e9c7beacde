"""A ready macro-enabled workbook for desktop Excel with xlwings, written on any system.

What xlwings 0.37 needs to serve the LW_ functions in Excel (Windows):

* its add-in (``xlwings addin install``, which also writes the user
  configuration ``~/.xlwings/xlwings.conf`` with ``INTERPRETER_WIN`` = the
  Python that ran the command) -- this needs Windows and Excel;
* a workbook whose VBA project refers to that add-in, and a sheet named
  ``xlwings.conf`` whose rows, contiguous from A1, hold a setting name in
  column A and its value in B. ``UDF Modules`` lists the Python modules
  (separated by ";") whose functions "Import Functions" registers.

The second part is files only, so it is made here: :func:`write_excel_workbook`
copies xlwings' own quickstart template (``quickstart.xlsm``, shipped in the
xlwings package with its VBA project; ``quickstart_standalone.xlsm`` with
``standalone=True``, which carries the xlwings VBA code itself), renames its
``_xlwings.conf`` sheet to ``xlwings.conf`` (which activates it) and writes the
settings. Only the settings given are written: a row present in the sheet
overrides the add-in's and the user configuration's value even when empty,
so the interpreter is left to ``xlwings addin install``'s user configuration
unless ``interpreter`` is given. A start sheet and the function reference's
example sheet are added. :func:`write_xlwings_conf` writes the same settings
as an ``xlwings.conf`` text file instead (read by xlwings for every workbook
in its folder, or for all workbooks as the user configuration).

What could and could not be checked without Excel: see addin/EXCEL.md.
"""
from __future__ import annotations

import argparse
import importlib
import sys
from pathlib import Path

__all__ = [
    "UDF_MODULES", "CONF_SHEET", "udf_modules", "conf_settings", "write_excel_workbook", "write_xlwings_conf",
    "functions_by_module", "template_path", "excel_main",
]

CONF_SHEET = "xlwings.conf"
_TEMPLATE_SHEET = "_xlwings.conf"  # the template's inactive configuration sheet


def udf_modules() -> list[str]:
    """The modules defining published LW_ functions, ``layerwise.addin.functions`` first."""
    from .functions import FUNCTIONS

    mods = sorted({f.__module__ for f in FUNCTIONS.values()})
    return sorted(mods, key=lambda m: (m != "layerwise.addin.functions", m))


UDF_MODULES = tuple(udf_modules())


def functions_by_module(modules=None) -> dict[str, list[str]]:
    """Module -> names of the functions xlwings' "Import Functions" would register from it.

    As xlwings does: every attribute of the imported module carrying ``__xlfunc__``
    metadata, whatever module defined it (a function imported into two listed
    modules would be registered twice, which Excel's VBA refuses).
    """
    out = {}
    for name in modules or UDF_MODULES:
        mod = importlib.import_module(name)
        out[name] = sorted(a for a in dir(mod) if hasattr(getattr(mod, a), "__xlfunc__"))
    return out


def template_path(standalone: bool = False) -> Path:
    """xlwings' quickstart workbook template (in the installed xlwings package)."""
    import xlwings

    path = Path(xlwings.__file__).parent / ("quickstart_standalone.xlsm" if standalone else "quickstart.xlsm")
    if not path.is_file():
        raise FileNotFoundError(f"xlwings {xlwings.__version__} has no {path.name} template at {path.parent}")
    return path


def conf_settings(*, udf_modules=None, interpreter=None, interpreter_mac=None, pythonpath=None, conda_path=None,
                  conda_env=None, use_udf_server=None, show_console=None, debug_udfs=None) -> list[tuple[str, object]]:
    """The (setting, value) rows for xlwings' configuration, in the template's order; unset ones are left out."""
    mods = list(udf_modules or UDF_MODULES)
    for m in mods:
        if not m or ";" in m or not all(part.isidentifier() for part in m.split(".")):
            raise ValueError(f"not a module name: {m!r}")
    rows = [
        ("Interpreter_Win", interpreter), ("Interpreter_Mac", interpreter_mac), ("PYTHONPATH", pythonpath),
        ("Conda Path", conda_path), ("Conda Env", conda_env), ("UDF Modules", ";".join(mods)),
        ("Debug UDFs", debug_udfs), ("Use UDF Server", use_udf_server), ("Show Console", show_console),
    ]
    out = []
    for key, value in rows:
        if value is None:
            continue
        if isinstance(value, str) and '"' in value:
            raise ValueError(f"{key}: xlwings' configuration cannot hold a double quote: {value!r}")
        out.append((key, value))
    return out


_NOTES = (
    "layerwise settings for xlwings (written by layerwise.addin.excel_setup).",
    "Settings are read from A1 down to the first empty cell; a row here overrides the xlwings add-in's settings and "
    "the xlwings.conf files, even when its value is empty. Delete a row to use those instead.",
    "UDF Modules: the Python modules whose LW_ functions the xlwings ribbon's 'Import Functions' registers.",
    "Without Interpreter_Win, the interpreter comes from the add-in settings, or from ~/.xlwings/xlwings.conf "
    "(written by 'xlwings addin install' with the Python that ran it).",
)


def _start_sheet(ws, example_sheet: bool):
    rows = [
        ("layerwise worksheet functions", None),
        ("1. Install the xlwings add-in once: xlwings addin install (from the Python where layerwise is installed).", None),
        ("2. Excel: Trust Center > Macro Settings > tick 'Trust access to the VBA project object model'.", None),
        ("3. xlwings ribbon tab > Import Functions; then recalculate all (Ctrl+Alt+F9).", None),
        (None, None),
        ("model", '=LW_MODEL_FREQSEV("poisson 5", "lognormal 2e6 2.5")'),
        ("distortion", '=LW_DISTORTION("wang", 0.4)'),
        ("attachment", 5_000_000),
        ("limit", 10_000_000),
        ("expected loss", "=LW_EXPECTED_LOSS(B6, B8, B9)"),
        ("premium", "=LW_PREMIUM(B6, B8, B9, B7)"),
        ("rate on line", "=LW_RATE_ON_LINE(B6, B8, B9, B7)"),
    ]
    if example_sheet:
        rows += [(None, None), ("Every function with an example: sheet Examples (column AB); see addin/REFERENCE.md.", None)]
    for r, (a, b) in enumerate(rows, start=1):
        if a is not None:
            ws.cell(r, 1, a)
        if b is not None:
            ws.cell(r, 2, b)
    ws.column_dimensions["A"].width = 16
    ws.column_dimensions["B"].width = 40


def write_excel_workbook(path="layerwise.xlsm", *, standalone: bool = False, examples: bool = True,
                         **settings) -> Path:
    """Write a macro-enabled workbook configured for the LW_ functions; return its path.

    ``settings`` are :func:`conf_settings`' keywords (``interpreter``,
    ``interpreter_mac``, ``pythonpath``, ``conda_path``, ``conda_env``,
    ``use_udf_server``, ``show_console``, ``debug_udfs``, ``udf_modules``).
    ``standalone=True`` starts from xlwings' standalone template (the xlwings
    VBA code inside the workbook, so calls work without the add-in; the
    functions are then imported with the ImportPythonUDFs macro).
    ``examples`` adds the function reference's example sheet. The path must
    end in ``.xlsm`` (a VBA project needs a macro-enabled workbook).
    """
    import openpyxl

    from .functions import FUNCTIONS

    path = Path(path)
    if path.suffix.lower() != ".xlsm":
        raise ValueError(f"a workbook with macros must end in .xlsm, got {path.name!r}")
    rows = conf_settings(**settings)
    mods = next(v for k, v in rows if k == "UDF Modules").split(";")
    registered = functions_by_module(mods)
    names = [n for ns in registered.values() for n in ns]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise ValueError(f"functions found in more than one UDF module (VBA would define them twice): {twice}")
    missing = sorted(set(FUNCTIONS) - set(names))
    if missing:
        raise ValueError(f"published functions in none of the UDF modules {mods}: {missing}")

    wb = openpyxl.load_workbook(template_path(standalone), keep_vba=True)
    conf = wb[_TEMPLATE_SHEET] if _TEMPLATE_SHEET in wb.sheetnames else wb[CONF_SHEET]
    conf.title = CONF_SHEET
    for row in conf.iter_rows():
        for cell in row:
            cell.value = None
    for r, (key, value) in enumerate(rows, start=1):
        conf.cell(r, 1, key)
        conf.cell(r, 2, value)
    for r, note in enumerate(_NOTES, start=len(rows) + 3):
        conf.cell(r, 1, note)
    conf.column_dimensions["B"].width = 60

    start = wb.worksheets[0] if wb.worksheets[0] is not conf else wb.create_sheet("layerwise", 0)
    start.title = "layerwise"
    _start_sheet(start, examples)
    if examples:
        from .reference import fill_example_sheet

        fill_example_sheet(wb.create_sheet("Examples"))
    wb.active = 0
    path.parent.mkdir(parents=True, exist_ok=True)
    wb.save(path)
    return path


def write_xlwings_conf(path="xlwings.conf", **settings) -> Path:
    """Write the settings as an xlwings.conf text file (``"KEY","value"`` lines); a folder gets ``xlwings.conf``."""
    path = Path(path)
    if path.is_dir():
        path = path / "xlwings.conf"
    lines = []
    for key, value in conf_settings(**settings):
        text = ("True" if value else "False") if isinstance(value, bool) else str(value)
        lines.append(f'"{key.upper()}","{text}"\n')
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("".join(lines), encoding="utf-8")
    return path


def excel_main(argv=None) -> int:
    """``excel [PATH] [--standalone] [--interpreter EXE] [--conf]``: write the workbook (or the xlwings.conf file)."""
    parser = argparse.ArgumentParser(
        prog="layerwise excel",
        description="Write a macro-enabled workbook set up for the LW_ functions with xlwings "
                    "(then, on Windows: xlwings addin install, open it, Import Functions).",
    )
    parser.add_argument("path", nargs="?", default=None, help="file to write (default: layerwise.xlsm, or xlwings.conf with --conf)")
    parser.add_argument("--standalone", action="store_true", help="start from xlwings' standalone template (VBA code inside)")
    parser.add_argument("--no-examples", action="store_true", help="leave out the sheet of example formulas")
    parser.add_argument("--interpreter", help="Interpreter_Win: path of python.exe / pythonw.exe (default: the add-in's setting)")
    parser.add_argument("--conda-path", help="Conda Path setting")
    parser.add_argument("--conda-env", help="Conda Env setting")
    parser.add_argument("--pythonpath", help="PYTHONPATH setting")
    parser.add_argument("--conf", action="store_true", help="write an xlwings.conf text file instead of a workbook")
    args = parser.parse_args(argv)
    settings = {"interpreter": args.interpreter, "conda_path": args.conda_path, "conda_env": args.conda_env,
                "pythonpath": args.pythonpath}
    if args.conf:
        out = write_xlwings_conf(args.path or "xlwings.conf", **settings)
    else:
        out = write_excel_workbook(args.path or "layerwise.xlsm", standalone=args.standalone,
                                   examples=not args.no_examples, **settings)
    print(out)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(excel_main())
