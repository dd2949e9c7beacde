"""Example workbooks: they recalculate headless without error cells, their key cells equal direct engine
calls, the committed files are current, and LibreOffice reads the priced copies' key cells."""
from __future__ import annotations

import csv
import math
import subprocess
import tempfile
from pathlib import Path

import openpyxl
import pytest
from openpyxl.worksheet.formula import ArrayFormula

from layerwise.addin import cells, examples
from layerwise.addin.functions import FUNCTIONS
from layerwise.addin.recalc import recalculate

ROOT = Path(__file__).resolve().parents[1]
COMMITTED = ROOT / "workbooks"
NAMES = list(examples.EXAMPLES)
# As tests/conftest.py: comma, double quote, UTF-8, raw values, every sheet to its own <stem>-<sheet>.csv.
_CSV_FILTER = "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,false,false,false,-1"


@pytest.fixture(scope="session")
def built(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("examples")
    return dict(zip(NAMES, examples.build_examples(folder)))


@pytest.fixture(scope="session")
def priced(built):
    """Each example recalculated once into its priced copy."""
    return {name: recalculate(path, functions=FUNCTIONS) for name, path in built.items()}


@pytest.fixture(scope="session")
def models():
    return {name: ex.model() for name, ex in examples.EXAMPLES.items()}


def _cell_ref(name):
    sheet, addr = name.split("!")
    return sheet, openpyxl.utils.cell.coordinate_to_tuple(addr)


@pytest.mark.parametrize("name", NAMES)
def test_recalculates_without_error_cells(priced, name):
    run = priced[name]
    assert not run.errors, dict(run.errors)
    texts = {c: v for c, v in run.values.items() if isinstance(v, str) and cells.parse_error(v) is not None}
    assert not texts, texts
    assert len(run.values) >= 15


@pytest.mark.parametrize("name", NAMES)
def test_key_cells_equal_direct_engine_calls(priced, models, name):
    ex = examples.EXAMPLES[name]
    run = priced[name]
    assert len(ex.key_cells) >= 10
    quantities = {k.quantity for k in ex.key_cells}
    assert "premium" in quantities
    for key in ex.key_cells:
        got = run.values[key.cell]
        want = key.expected(models[name])
        assert isinstance(got, float) and math.isfinite(want), (key.cell, got, want)
        assert got == pytest.approx(want, rel=1e-9, abs=1e-9), (key.cell, key.quantity)
    for cell, prefix in ex.text_cells.items():
        assert str(run.values[cell]).startswith(prefix), (cell, run.values[cell])


def test_examples_cover_the_brief():
    ex = examples.EXAMPLES
    assert set(ex) == {"cat_tower", "casualty_xl", "rating_sheet", "distortion_comparison", "capital"}
    cat = ex["cat_tower"]
    assert all(k.layer.has_occurrence_terms and math.isfinite(k.layer.agg_limit) for k in cat.key_cells), \
        "per-occurrence layers with reinstatements"
    quantities = {k.quantity for k in ex["rating_sheet"].key_cells}
    assert {"premium", "loss_ratio", "rate_on_line", "capital", "return_on_capital"} <= quantities
    families = {k.distortion.family for k in ex["distortion_comparison"].key_cells if k.distortion is not None}
    assert families == {"wang", "proportional_hazard", "dual_power", "tvar", "cost_of_capital"}
    assert {"parameter", "assets", "return_on_capital"} <= {k.quantity for k in ex["capital"].key_cells}


def test_distortion_comparison_charges_about_the_same_total(priced):
    run = priced["distortion_comparison"]
    ex = examples.EXAMPLES["distortion_comparison"]
    totals = {}
    for k in ex.key_cells:
        if k.quantity == "premium":
            totals[k.distortion.family] = totals.get(k.distortion.family, 0.0) + run.values[k.cell]
    el = sum(run.values[k.cell] for k in ex.key_cells if k.quantity == "expected_loss")
    for fam, total in totals.items():
        assert total / el == pytest.approx(examples.HAIL_TOWER_LOAD, rel=2e-3), fam


def test_capital_workbook_hits_the_target_and_adds_up(priced):
    v = priced["capital"].values
    for r in range(17, 22):  # one row per family: the portfolio earns the target
        assert v[f"Capital!G{r}"] == pytest.approx(examples.CAPITAL_TARGET, rel=1e-6)
    # the units' allocated premiums add up to the portfolio's premium
    ws = openpyxl.load_workbook(priced["capital"].target, data_only=True)["Capital"]
    rows = [r for r in range(1, ws.max_row + 1) if ws.cell(r, 1).value in ("windstorm", "hail", "casualty", "total")]
    assert len(rows) >= 4
    unit_rows = [r for r in rows if ws.cell(r, 1).value != "total"][:3]
    total_row = next(r for r in rows if ws.cell(r, 1).value == "total")
    assert sum(ws.cell(r, 3).value for r in unit_rows) == pytest.approx(ws.cell(total_row, 3).value, rel=1e-9)


@pytest.mark.parametrize("name", NAMES)
def test_committed_workbook_is_current(built, name):
    committed = COMMITTED / examples.EXAMPLES[name].filename
    assert committed.exists(), f"{committed} is missing: run python workbooks/build.py"
    diffs = examples.compare_contents(committed, built[name])
    assert not diffs, "regenerate with python workbooks/build.py:\n" + "\n".join(diffs)


@pytest.mark.parametrize("name", NAMES)
def test_layout_caution_inputs_and_formats(built, name):
    ex = examples.EXAMPLES[name]
    wb = openpyxl.load_workbook(built[name])
    ws = wb.worksheets[0]
    assert ws["A1"].value == ex.title and ws["A1"].font.b
    texts = [c.value for row in ws.iter_rows(max_row=6) for c in row if isinstance(c.value, str)]
    assert examples.CAUTION in texts, "the caution note is on the first sheet, near the top"
    assert "not a quote" in examples.CAUTION and "licensed actuarial judgement" in examples.CAUTION
    assert any("USD" in t for t in texts), "units are stated"
    fills = [c for row in ws.iter_rows() for c in row if c.fill.fgColor.rgb == "00" + examples.INPUT_FILL.fgColor.rgb[-6:]
             or c.fill.fgColor.rgb == examples.INPUT_FILL.fgColor.rgb]
    assert len(fills) >= 5, "input cells are shaded"
    arrays = set()
    for sheet in wb.worksheets:
        for anchor, ref in sheet.array_formulae.items():
            c1, r1, c2, r2 = openpyxl.utils.cell.range_boundaries(ref)
            arrays |= {(sheet.title, r, c) for r in range(r1, r2 + 1) for c in range(c1, c2 + 1)}
    for key in ex.key_cells:
        sheet, (r, c) = _cell_ref(key.cell)
        cell = wb[sheet].cell(r, c)
        assert (sheet, r, c) not in arrays and not isinstance(cell.value, ArrayFormula), key.cell
        assert isinstance(cell.value, str) and cell.value.startswith("="), key.cell
        if key.quantity in ("premium", "expected_loss", "capital", "margin", "assets"):
            assert cell.number_format == examples.AMOUNT, key.cell
        elif key.quantity in ("loss_ratio", "rate_on_line", "return_on_capital"):
            assert "%" in cell.number_format, key.cell
    for sheet in wb.worksheets:
        assert sheet.column_dimensions["A"].width >= 8
    if "LW_TOWER" in str([c.value for row in ws.iter_rows() for c in row]):
        assert any(isinstance(c.value, ArrayFormula) for row in ws.iter_rows() for c in row)


def test_no_omitted_middle_arguments(built):
    """formulas passes an omitted middle argument as 0: every LW_ call writes its arguments out."""
    for path in built.values():
        for ws in openpyxl.load_workbook(path).worksheets:
            for row in ws.iter_rows():
                for c in row:
                    text = c.value.text if isinstance(c.value, ArrayFormula) else c.value
                    if isinstance(text, str) and text.startswith("="):
                        squeezed = text.replace(" ", "")
                        assert ",," not in squeezed and "(," not in squeezed, (ws.title, c.coordinate, text)


@pytest.fixture(scope="session")
def libreoffice_csv(soffice, priced, tmp_path_factory):
    """Every priced copy converted by LibreOffice (without recalculating) in one run: {name: {sheet: rows}}."""
    out = tmp_path_factory.mktemp("lo-csv")
    profile = Path(tempfile.mkdtemp(prefix="lo-profile-", dir=out))
    files = [str(run.target) for run in priced.values()]
    cmd = [soffice, f"-env:UserInstallation={profile.as_uri()}", "--headless", "--norestore",
           "--convert-to", _CSV_FILTER, "--outdir", str(out), *files]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    result = {}
    for name, run in priced.items():
        sheets = {}
        for sheet in {k.cell.split("!")[0] for k in examples.EXAMPLES[name].key_cells}:
            path = out / f"{run.target.stem}-{sheet}.csv"
            if not path.exists():
                raise AssertionError(f"soffice wrote no {path.name} (exit {done.returncode}): {done.stderr[-500:]}")
            with open(path, newline="", encoding="utf-8") as fh:
                sheets[sheet] = list(csv.reader(fh))
        result[name] = sheets
    return result


def _number(text: str) -> float:
    """A number as LibreOffice writes it to CSV (percent-formatted cells keep their % sign)."""
    return float(text[:-1]) / 100.0 if text.endswith("%") else float(text)


@pytest.mark.parametrize("name", NAMES)
def test_libreoffice_reads_the_key_cells(libreoffice_csv, priced, name):
    """LibreOffice shows the cached numbers of the ordinary key cells (not #NAME?)."""
    sheets = libreoffice_csv[name]
    run = priced[name]
    for key in examples.EXAMPLES[name].key_cells:
        sheet, (r, c) = _cell_ref(key.cell)
        shown = sheets[sheet][r - 1][c - 1]
        assert _number(shown) == pytest.approx(run.values[key.cell], rel=1e-9, abs=1e-9), (key.cell, shown)
    for cell, prefix in examples.EXAMPLES[name].text_cells.items():
        sheet, (r, c) = _cell_ref(cell)
        assert sheets[sheet][r - 1][c - 1].startswith(prefix), cell
