"""The layerwise command line: help texts, exit codes, demo, price (what-ifs, charts), trace, tower, functions."""
from __future__ import annotations

import hashlib
import math
import subprocess
import sys
import zipfile
from pathlib import Path
from xml.etree import ElementTree as ET

import numpy as np
import openpyxl
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.addin import cli, examples, functions
from layerwise.addin.cli import EXIT_ERRORS, EXIT_OK, EXIT_USAGE, main
from layerwise.addin.demo_data import hail_year_loss_table, storm_year_event_table
from layerwise.addin.xlsx_images import Picture, add_image_sheet, png_size

SUBCOMMANDS = ["demo", "price", "trace", "tower", "functions"]


def run(capsys, *argv) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def rating(tmp_path_factory) -> Path:
    """The small rating-sheet example (prices in a fraction of a second)."""
    folder = tmp_path_factory.mktemp("rating")
    return examples.build_examples(folder, ["rating_sheet"])[0]


def _digest(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# ---------------------------------------------------------------- help and usage
def test_help_texts_document_exit_codes(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for word in SUBCOMMANDS + ["exit codes", "0  ok", "1  the workbook has error cells", "2  bad usage"]:
        assert word in out
    for sub in SUBCOMMANDS:
        with pytest.raises(SystemExit) as exc:
            main([sub, "--help"])
        assert exc.value.code == 0
        text = capsys.readouterr().out
        assert "exit codes" in text and "not\nquotes, offers of cover or advice" in text, sub
    assert "--set" in _help(capsys, "price") and "--charts" in _help(capsys, "price")
    tower = _help(capsys, "tower")
    for option in ("--year-loss", "--year-event", "--years", "--layers", "--stack", "--distortion", "--basis",
                   "--reinstatements", "--csv"):
        assert option in tower


def _help(capsys, sub) -> str:
    with pytest.raises(SystemExit):
        main([sub, "--help"])
    return capsys.readouterr().out


def test_bad_usage_exits_2(capsys, rating, tmp_path):
    with pytest.raises(SystemExit) as exc:
        main(["no-such-command"])
    assert exc.value.code == EXIT_USAGE
    with pytest.raises(SystemExit) as exc:
        main([])
    assert exc.value.code == EXIT_USAGE
    capsys.readouterr()
    assert run(capsys, "price", str(tmp_path / "missing.xlsx"))[0] == EXIT_USAGE
    (tmp_path / "not.xlsx").write_text("hello")
    code, _, err = run(capsys, "price", str(tmp_path / "not.xlsx"))
    assert code == EXIT_USAGE and "not a zip" in err
    code, _, err = run(capsys, "price", str(rating), "--set", "B7")
    assert code == EXIT_USAGE and "SHEET!CELL=VALUE" in err
    code, _, err = run(capsys, "price", str(rating), "--set", "Rating!E8=5")  # a formula cell
    assert code == EXIT_USAGE and "formula" in err
    code, _, err = run(capsys, "price", str(rating), "--set", "Nosheet!B7=5")
    assert code == EXIT_USAGE and "Nosheet" in err
    code, _, err = run(capsys, "price", str(rating), "-o", str(rating))
    assert code == EXIT_USAGE and "overwrite" in err
    code, _, err = run(capsys, "price", str(rating), "-o", str(tmp_path / "nofolder" / "x.xlsx"))
    assert code == EXIT_USAGE


# ---------------------------------------------------------------- functions
def test_functions_lists_the_published_functions(capsys):
    code, out, _ = run(capsys, "functions")
    assert code == EXIT_OK
    assert "LW_PREMIUM(model, attachment, limit, distortion, [share], [basis], [reinstatements], [agg_deductible])" in out
    for name in functions.FUNCTIONS:
        assert name + "(" in out
    assert "LW_PORTFOLIO(" in out and f"{len(functions.FUNCTIONS)} functions" in out
    code, out, _ = run(capsys, "functions", "lw_premium")
    assert code == EXIT_OK and "limit:" in out and "Risk-loaded technical premium" in out
    assert run(capsys, "functions", "LW_NOPE")[0] == EXIT_USAGE


# ---------------------------------------------------------------- price
def test_price_writes_a_copy_and_summarises(capsys, rating, tmp_path):
    before = _digest(rating)
    out_path = tmp_path / "rated.xlsx"
    code, out, _ = run(capsys, "price", str(rating), "-o", str(out_path))
    assert code == EXIT_OK
    assert _digest(rating) == before, "the input is never changed"
    assert "formula cells computed in" in out and "No error cells." in out and "rated.xlsx" in out
    assert "Technical premium" in out and "724,442" in out  # the rating table, amounts with separators
    assert "45.3%" in out  # rate on line as a percentage
    cached = openpyxl.load_workbook(out_path, data_only=True)["Rating"]
    model = examples.EXAMPLES["rating_sheet"].model()
    premium = lw.price_layers(model, [examples._rating_layer()], lw.WangTransform(0.45)).iloc[0]["premium"]
    assert cached["E8"].value == pytest.approx(premium, rel=1e-12)


def test_overrides_change_the_result(capsys, rating, tmp_path):
    out_path = tmp_path / "half.xlsx"
    code, out, _ = run(capsys, "price", str(rating), "-o", str(out_path), "--set", "Rating!B9=50%",
                       "--set", "Rating!B24=0.3")
    assert code == EXIT_OK
    cached = openpyxl.load_workbook(out_path, data_only=True)["Rating"]
    assert cached["B9"].value == 0.5 and cached["B24"].value == 0.3
    model = examples.EXAMPLES["rating_sheet"].model()
    layer = examples._rating_layer(share=0.5)
    want = lw.price_layers(model, [layer], lw.WangTransform(0.3)).iloc[0]["premium"]
    assert cached["E8"].value == pytest.approx(want, rel=1e-12)
    base = lw.price_layers(model, [examples._rating_layer()], lw.WangTransform(0.45)).iloc[0]["premium"]
    assert abs(cached["E8"].value - base) > 1000


def test_error_cells_exit_1_with_their_messages(capsys, tmp_path):
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Book"
    ws["A1"] = '=LW_MODEL_FREQSEV("poisson 2", "lognormal 1e6 1.5")'
    ws["A2"] = '=LW_PREMIUM(A1, 1000000, -5, "wang 0.4", 1, "", "")'
    ws["A3"] = "=1/0"
    wb.save(tmp_path / "bad.xlsx")
    code, out, _ = run(capsys, "price", str(tmp_path / "bad.xlsx"))
    assert code == EXIT_ERRORS
    assert "2 error cells" in out
    assert "Book!A2: #VALUE! LW_PREMIUM(limit)" in out and "Book!A3: #DIV/0!" in out
    assert (tmp_path / "bad.priced.xlsx").exists()


def test_parse_helpers():
    assert cli.parse_value("1e6") == 1e6 and cli.parse_value("2_000_000") == 2e6 and cli.parse_value("35%") == 0.35
    assert cli.parse_value("1,500") == 1500.0 and cli.parse_value("TRUE") is True and cli.parse_value("") is None
    assert cli.parse_value("wang") == "wang" and cli.parse_value('"0.35"') == "0.35"
    assert cli.parse_overrides(["Tower!B13=0.45", "'My sheet'!C2=wang", "B3="]) == {
        "Tower!B13": 0.45, "'My sheet'!C2": "wang", "B3": None}
    assert cli.parse_amount("5m", "x") == 5e6 and cli.parse_amount("250k", "x") == 250e3
    assert cli.parse_amount("1.5bn", "x") == 1.5e9 and cli.parse_amount("unlimited", "x", allow_unlimited=True) == math.inf
    assert cli.parse_layers("5e6 xs 1e6, 10e6 xs 6e6") == [(1e6, 5e6, 1.0), (6e6, 10e6, 1.0)]
    assert cli.parse_layers("40% of 5m xs 1m; 1,000,000 xs 6,000,000") == [(1e6, 5e6, 0.4), (6e6, 1e6, 1.0)]
    for bad in ("5e6", "5e6 xs", "five xs 1", "0 xs 1e6", "150% of 1 xs 2"):
        with pytest.raises(cli.UsageError):
            cli.parse_layers(bad)
    assert cli.format_cell(1234567.8, "#,##0") == "1,234,568" and cli.format_cell(0.1234, "0.0%") == "12.3%"


# ---------------------------------------------------------------- charts
def test_price_with_charts_embeds_them(capsys, rating, tmp_path, soffice_csv):
    out_path = tmp_path / "charted.xlsx"
    code, out, _ = run(capsys, "price", str(rating), "-o", str(out_path), "--charts")
    assert code == EXIT_OK
    pngs = [tmp_path / f"charted.{kind}.png" for kind in ("exceedance", "distortions", "premium_split")]
    for p in pngs:
        assert p.exists() and png_size(p)[0] > 300 and f"Chart: {p.name}" in out.replace(str(tmp_path) + "/", "")
    wb = openpyxl.load_workbook(out_path)
    assert wb.sheetnames == ["Rating", "Charts"]
    assert len(wb["Charts"]._images) == 3
    assert "not a quote" in " ".join(str(c.value) for c in wb["Charts"]["A"] if c.value)
    cached = openpyxl.load_workbook(out_path, data_only=True)["Rating"]
    assert isinstance(cached["E8"].value, float), "the cached values survive the extra sheet"
    sheets = soffice_csv(out_path, ["Rating", "Charts"])
    assert sheets["Charts"][0][0].startswith("Charts drawn by layerwise")
    assert float(sheets["Rating"][7][4]) == pytest.approx(cached["E8"].value, rel=1e-9)


def test_recording_is_restored():
    real = functions.price_layers
    with cli.recording() as calls:
        functions.LW_PREMIUM("freqsev(poisson 2, lognormal 1e6 1.5)", 1e6, 1e6, "wang 0.4")
        assert functions.price_layers is not real
    assert functions.price_layers is real
    model, layers, g = calls[0]
    assert isinstance(model, lw.FrequencySeverity) and layers[0].limit == 1e6 and g == lw.WangTransform(0.4)
    plan = cli.chart_plan(calls)
    assert plan[0] is model and list(plan[2]) == ["wang(lam=0.4)"] and plan[3] == g
    assert cli.chart_plan([]) is None


def test_add_image_sheet_keeps_the_package_valid(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(3, 2))
    ax.plot([0, 1], [0, 1])
    fig.savefig(tmp_path / "a.png", dpi=50)
    plt.close(fig)
    wb = openpyxl.Workbook()
    wb.active.title = "Charts"
    wb.active["A1"] = 3.5
    wb.create_sheet("Other")["B2"] = "text"
    wb.save(tmp_path / "src.xlsx")
    name = add_image_sheet(tmp_path / "src.xlsx", tmp_path / "out.xlsx",
                           [Picture(tmp_path / "a.png", "first <one> & only"), tmp_path / "a.png"],
                           title="Title", notes=["x " * 80])
    assert name == "Charts (2)"
    with zipfile.ZipFile(tmp_path / "out.xlsx") as z:
        assert z.testzip() is None
        for part in z.namelist():
            if part.endswith((".xml", ".rels")):
                ET.fromstring(z.read(part))  # well-formed
        assert sum(p.startswith("xl/media/") for p in z.namelist()) == 2
    back = openpyxl.load_workbook(tmp_path / "out.xlsx")
    assert back.sheetnames == ["Charts", "Other", "Charts (2)"]
    assert back["Charts"]["A1"].value == 3.5 and back["Other"]["B2"].value == "text"
    sheet = back["Charts (2)"]
    assert len(sheet._images) == 2 and sheet["A1"].value == "Title"
    assert "first <one> & only" in [c.value for c in sheet["A"]]
    with pytest.raises(ValueError):
        add_image_sheet(tmp_path / "src.xlsx", tmp_path / "o2.xlsx", [tmp_path / "a.png"], sheet_name="bad/name")
    with pytest.raises(ValueError):
        add_image_sheet(tmp_path / "src.xlsx", tmp_path / "o2.xlsx", [tmp_path / "src.xlsx"])  # not a PNG


# ---------------------------------------------------------------- trace
def test_trace_reaches_constants(capsys, rating):
    code, out, _ = run(capsys, "trace", str(rating), "Rating!E8")
    assert code == EXIT_OK
    lines = out.splitlines()
    assert lines[0].startswith("Rating!E8  =LW_PREMIUM(") and "-> 724442" in lines[0]
    assert any(line.startswith("  Rating!B30  =LW_MODEL_FREQSEV(") for line in lines)
    assert any(line.strip().startswith('Rating!B14  -> "poisson"') for line in lines)  # a constant, two levels down
    assert any(line.strip() == "Rating!B7  -> 1000000" for line in lines)
    code, out, _ = run(capsys, "trace", str(rating), "Rating!E8", "--depth", "1")
    assert all(not line.startswith("    ") for line in out.splitlines())
    code, out, _ = run(capsys, "trace", str(rating), "Rating!E8", "--set", "Rating!B24=0.3")
    assert "Rating!B24  -> 0.3" in out and "-> 724442" not in out.splitlines()[0]
    assert run(capsys, "trace", str(rating), "Nosheet!A1")[0] == EXIT_USAGE
    assert run(capsys, "trace", str(rating), "not a cell")[0] == EXIT_USAGE
    assert sorted(p.name for p in Path(rating).parent.iterdir()) == ["rating_sheet.xlsx"], "trace writes nothing"


def test_trace_of_an_error_cell_exits_1(capsys, tmp_path):
    wb = openpyxl.Workbook()
    wb.active["A1"] = -5
    wb.active["A2"] = '=LW_PREMIUM("freqsev(poisson 2, lognormal 1e6 1.5)", 0, A1, "wang 0.4", 1, "", "")'
    wb.save(tmp_path / "e.xlsx")
    code, out, _ = run(capsys, "trace", str(tmp_path / "e.xlsx"), "A2")
    assert code == EXIT_ERRORS and "LW_PREMIUM(limit)" in out and "A1  -> -5" in out


# ---------------------------------------------------------------- demo
def test_demo_in_an_empty_folder(capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code, out, _ = run(capsys, "demo")
    assert code == EXIT_OK
    folder = tmp_path / "layerwise-demo"
    names = sorted(p.name for p in folder.iterdir())
    assert names == sorted([ex.filename for ex in examples.EXAMPLES.values()] + ["cat_tower.priced.xlsx"])
    assert "Priced copy: layerwise-demo/cat_tower.priced.xlsx" in out and "No error cells." in out
    assert "layerwise trace layerwise-demo/cat_tower.xlsx Tower!G17" in out
    assert "Technical prices, not quotes or advice" in out
    # the printed tower is the engine's
    model = examples.EXAMPLES["cat_tower"].model()
    frame = lw.price_layers(model, examples._cat_layers(), lw.WangTransform(0.35))
    for i, row in frame.iterrows():
        line = next(x for x in out.splitlines() if x.strip().startswith(f"Layer {i + 1} "))
        assert f"{row['premium']:,.0f}" in line and f"{row['expected_loss']:,.0f}" in line
        assert f"{row['loss_ratio']:.1%}" in line and f"{row['rate_on_line']:.1%}" in line
    cached = openpyxl.load_workbook(folder / "cat_tower.priced.xlsx", data_only=True)["Tower"]
    assert cached["G17"].value == pytest.approx(frame["premium"][0], rel=1e-12)


def test_module_entry_point_runs(tmp_path):
    done = subprocess.run([sys.executable, "-m", "layerwise.addin.cli", "functions"], cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and "LW_TOWER(" in done.stdout
    done = subprocess.run([sys.executable, "-m", "layerwise.addin.cli", "tower"], cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == EXIT_USAGE and "give one loss table" in done.stderr


# ---------------------------------------------------------------- tower
@pytest.fixture(scope="module")
def event_csv(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("tables") / "events.csv"
    storm_year_event_table(1_500, seed=7).rename(columns={"year": "yr", "loss": "amount"}).to_csv(path, index=False)
    return path


def test_tower_from_a_year_event_csv(capsys, event_csv, tmp_path):
    out_csv = tmp_path / "tower.csv"
    code, out, _ = run(capsys, "tower", "--year-event", str(event_csv), "--year-column", "yr", "--loss-column", "amount",
                       "--years", "1600", "--layers", "15m xs 10m, 25m xs 25m", "--reinstatements", "1",
                       "--distortion", "wang 0.35", "--csv", str(out_csv))
    assert code == EXIT_OK and "Wrote 2 rows" in out and "1,600 years" in out
    got = pd.read_csv(out_csv)
    table = pd.read_csv(event_csv)
    model = lw.YearEventTable(table["yr"].to_numpy(float), table["amount"].to_numpy(float), 1600)
    layers = [lw.Layer.occurrence(10e6, 15e6, reinstatements=1), lw.Layer.occurrence(25e6, 25e6, reinstatements=1)]
    want = lw.price_layers(model, layers, lw.WangTransform(0.35))
    for col in ("expected_loss", "premium", "capital", "rate_on_line"):
        np.testing.assert_allclose(got[col], want[col], rtol=1e-12)
    assert list(got["distortion"]) == ["wang 0.35"] * 2
    # the same in the terminal
    code, out, _ = run(capsys, "tower", "--year-event", str(event_csv), "--year-column", "yr", "--loss-column", "amount",
                       "--years", "1600", "--layers", "15m xs 10m, 25m xs 25m", "--reinstatements", "1",
                       "--distortion", "wang 0.35")
    assert code == EXIT_OK and f"{want['premium'][0]:,.0f}" in out and f"{want['loss_ratio'][1]:.1%}" in out


def test_tower_from_a_year_loss_parquet(capsys, tmp_path):
    pytest.importorskip("pyarrow")
    path = tmp_path / "years.parquet"
    hail_year_loss_table(2_000).to_parquet(path)
    code, out, _ = run(capsys, "tower", "--year-loss", str(path), "--stack", "10e6, 15e6, unlimited", "--start", "20e6",
                       "--distortion", "ph 0.8", "--distortion", "tvar 0.9")
    assert code == EXIT_OK
    model = lw.YearLossTable(hail_year_loss_table(2_000)["loss"].to_numpy(float))
    layers = lw.stack([10e6, 15e6, math.inf], start=20e6, basis="aggregate")
    want = lw.price_layers(model, layers, {"ph": lw.ProportionalHazard(0.8), "tvar": lw.TVaRDistortion(0.9)})
    assert out.count("ph 0.8") == 3 and out.count("tvar 0.9") == 3 and "aggregate" in out
    for p in want["premium"]:
        assert f"{p:,.0f}" in out


def test_tower_bad_input_exits_2(capsys, event_csv, tmp_path):
    base = ["tower", "--year-event", str(event_csv), "--year-column", "yr", "--loss-column", "amount"]
    cases = [
        (base + ["--layers", "5m xs 1m"], "--distortion"),
        (base + ["--distortion", "wang 0.4"], "give the layers"),
        (base + ["--layers", "5m xs", "--distortion", "wang 0.4"], "LIMIT xs ATTACHMENT"),
        (base + ["--layers", "5m xs 1m", "--distortion", "nosuch 3"], "nosuch"),
        (["tower", "--year-event", str(event_csv), "--layers", "5m xs 1m", "--distortion", "wang 0.4"], "no column 'year'"),
        (base + ["--layers", "5m xs 1m", "--distortion", "wang 0.4", "--years", "3"], "n_years"),
        (["tower", "--year-loss", str(tmp_path / "none.csv"), "--layers", "5m xs 1m", "--distortion", "wang 0.4"],
         "not found"),
        (["tower", "--year-loss", str(event_csv), "--column", "amount", "--basis", "occurrence",
          "--layers", "5m xs 1m", "--distortion", "wang 0.4"], "annual totals"),
    ]
    for argv, words in cases:
        code, _, err = run(capsys, *argv)
        assert code == EXIT_USAGE and words in err, (argv, err)


def test_progress_paths_and_several_workbooks(capsys, monkeypatch, event_csv, rating, tmp_path):
    monkeypatch.setattr(cli, "PROGRESS_BYTES", 0)  # every file counts as large: read through the progress bar
    parquet = tmp_path / "events.parquet"
    pd.read_csv(event_csv).to_parquet(parquet)
    outs = []
    for path in (event_csv, parquet):
        code, out, _ = run(capsys, "tower", "--year-event", str(path), "--year-column", "yr", "--loss-column", "amount",
                           "--stack", "10m 20m", "--start", "5m", "--distortion", "dual 1.5")
        assert code == EXIT_OK
        outs.append(out.split("\n", 1)[1])
    assert outs[0] == outs[1], "CSV and Parquet give the same tower"
    second = tmp_path / "second.xlsx"
    second.write_bytes(Path(rating).read_bytes())
    code, out, _ = run(capsys, "price", str(rating), str(second))
    assert code == EXIT_OK and out.count("== ") == 2 and (tmp_path / "second.priced.xlsx").exists()
    assert run(capsys, "price", str(rating), str(second), "-o", str(tmp_path / "x.xlsx"))[0] == EXIT_USAGE


def test_delegated_subcommands_reach_their_modules(tmp_path, capsys):
    from layerwise.addin.cli import main

    assert main(["reference", "--check"]) == 0
    out = tmp_path / "bundle"
    out.mkdir()
    assert main(["export", str(out)]) == 0
    assert (out / "layerwise_functions.py").stat().st_size > 10_000
    target = tmp_path / "book.xlsm"
    assert main(["excel", str(target)]) == 0
    assert target.exists()
    capsys.readouterr()
    with pytest.raises(SystemExit) as stop:
        main(["--help"])
    assert stop.value.code == 0
    listing = capsys.readouterr().out
    for name in ("reference", "excel", "export"):
        assert name in listing
