"""The function reference: current, made of the function dialog's own words, and every example formula works."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from layerwise.addin import cells, reference
from layerwise.addin.functions import FUNCTIONS
from layerwise.addin.recalc import CellError, recalculate

FIX = "regenerate it with: python -m layerwise.addin.reference --write"
COMMITTED = Path(__file__).resolve().parents[1] / "addin" / "REFERENCE.md"  # in the repository, installed or not


def _section(text: str, name: str) -> str:
    start = text.index(f"\n### {name}\n")
    end = text.find("\n### ", start + 1)
    nxt = text.find("\n## ", start + 1)
    ends = [e for e in (end, nxt) if e != -1]
    return text[start: min(ends) if ends else len(text)]


def test_committed_reference_is_current():
    committed = COMMITTED.read_text(encoding="utf-8")
    assert committed == reference.render_reference(), f"addin/REFERENCE.md is out of date; {FIX}"


def test_reference_uses_the_function_dialogs_words():
    """Description and argument help texts straight from the xlwings metadata (what Excel registers)."""
    text = reference.render_reference()
    for name, f in FUNCTIONS.items():
        meta = f.__xlfunc__
        section = _section(text, name)
        assert "\n" + meta["ret"]["doc"] + "\n" in section, name
        rows = [line for line in section.splitlines() if line.startswith("| `")]
        assert [re.match(r"\| `(\w+)`", r).group(1) for r in rows] == [a["name"] for a in meta["args"]], name
        for a, row in zip(meta["args"], rows):
            assert row.endswith("| " + reference._cell(a["doc"]) + " |"), (name, a["name"])
            assert ("| required |" in row) is ("optional" not in a), (name, a["name"])
        signature = f"`{name}(" + ", ".join(f"[{a['name']}]" if "optional" in a else a["name"] for a in meta["args"]) + ")`"
        assert signature in section


def test_every_published_function_is_grouped_and_has_an_example():
    grouped = [n for names in reference.GROUPS.values() for n in names]
    assert len(grouped) == len(set(grouped)), "a function is listed in two groups"
    missing = sorted(set(FUNCTIONS) - set(reference.EXAMPLES))
    assert not missing, f"published functions without an example in reference.EXAMPLES: {missing}"
    ungrouped = sorted(set(FUNCTIONS) - set(grouped))
    assert not ungrouped, f"published functions in no group of reference.GROUPS: {ungrouped}"
    assert not set(reference.EXAMPLES) - set(FUNCTIONS), "examples of functions that are not published"
    assert not set(grouped) - set(FUNCTIONS), "groups list functions that are not published"
    for name, formula in reference.EXAMPLES.items():
        assert formula.startswith(f"={name}("), (name, formula)  # the example shows the function itself
        assert f"Example: `{formula}`" in _section(reference.render_reference(), name)


def test_reference_groups_follow_the_issue_order():
    assert list(reference.GROUPS) == ["Building models", "Distortions", "Layer values", "Tables", "Capital and calibration"]
    text = reference.render_reference()
    positions = [text.index(f"\n## {g}\n") for g in reference.GROUPS]
    assert positions == sorted(positions)
    assert "## Other functions" not in text


def test_units_and_defaults_are_shown():
    assert reference.unit_of("LW_PREMIUM", "attachment") == "currency units"
    assert reference.unit_of("LW_PORTFOLIO", "level") == "probability, or currency units"
    assert reference.unit_of("LW_X", "no_such_argument") == "see help"
    help_text = {a["name"]: a["doc"] for a in FUNCTIONS["LW_PREMIUM"].__xlfunc__["args"]}
    assert reference.default_text(help_text["share"]) == "1 (100%)"
    assert reference.default_text(help_text["reinstatements"]) == "unlimited"
    tower = {a["name"]: a["doc"] for a in FUNCTIONS["LW_TOWER"].__xlfunc__["args"]}
    assert reference.default_text(tower["reinstatements"]) == "unlimited"
    fs = {a["name"]: a["doc"] for a in FUNCTIONS["LW_MODEL_FREQSEV"].__xlfunc__["args"]}
    assert reference.default_text(fs["method"]) == "moment"
    assert reference.default_text("Level, e.g. 0.99; not used otherwise.") is None
    for name, f in FUNCTIONS.items():
        for a in f.__xlfunc__["args"]:
            assert reference.unit_of(name, a["name"]) != "see help", (name, a["name"])


@pytest.fixture(scope="module")
def recalculated(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("reference")
    book = reference.write_example_workbook(tmp / "examples.xlsx")
    return recalculate(book, tmp / "examples.priced.xlsx", functions=FUNCTIONS)


def _is_error(value) -> bool:
    return isinstance(value, CellError) or (isinstance(value, str) and cells.parse_error(value) is not None)


def test_every_example_formula_evaluates_without_error(recalculated):
    run = recalculated
    cells_by_name = dict(zip([n for n in FUNCTIONS if n in reference.EXAMPLES], reference.example_cells()))
    assert set(cells_by_name) == set(FUNCTIONS)
    for name, cell in cells_by_name.items():
        key = f"Examples!{cell}"
        assert key in run.values, (name, cell)
        value = run.values[key]
        assert key not in run.errors and not _is_error(value), (name, reference.EXAMPLES[name], value)
        assert value is not None and value != "", (name, value)
    # the example sheet's own builders too
    for cell, content, _ in reference.EXAMPLE_SHEET:
        if isinstance(content, str) and content.startswith("="):
            value = run.values[f"Examples!{cell}"]
            assert not _is_error(value), (cell, content, value)


def test_examples_give_the_values_of_direct_calls(recalculated):
    run = recalculated
    v = {k.split("!")[1]: x for k, x in run.values.items()}
    assert v["B1"] == FUNCTIONS["LW_MODEL_FREQSEV"]("poisson 5", "lognormal 2e6 2.5")
    cell = reference.example_cells()
    where = {reference.EXAMPLES[n]: c for n, c in zip([n for n in FUNCTIONS if n in reference.EXAMPLES], cell)}
    premium = v[where[reference.EXAMPLES["LW_PREMIUM"]]]
    assert premium == pytest.approx(FUNCTIONS["LW_PREMIUM"](v["B1"], 5e6, 10e6, v["B2"]), rel=1e-12)
    el = v[where[reference.EXAMPLES["LW_EXPECTED_LOSS"]]]
    assert 0 < el < premium


def test_reference_main_prints_writes_and_checks(tmp_path, capsys):
    assert reference.reference_main([]) == 0
    assert capsys.readouterr().out == reference.render_reference()
    target = tmp_path / "REF.md"
    assert reference.reference_main(["--check", "--path", str(target)]) == 1
    assert reference.reference_main(["--write", "--path", str(target)]) == 0
    assert target.read_text(encoding="utf-8") == reference.render_reference()
    assert reference.reference_main(["--check", "--path", str(target)]) == 0
    capsys.readouterr()
