"""The function reference (addin/REFERENCE.md), generated from the published functions' own metadata.

:func:`render_reference` writes Markdown from :func:`~layerwise.addin.functions.describe_functions`,
that is from the xlwings metadata Excel's function dialog shows: each
function's one-line description, its arguments with their help texts,
whether each is optional and what an empty cell means. Added here, per
function: its group (:data:`GROUPS`), an example formula (:data:`EXAMPLES`)
and, per argument name, the unit of its values (:data:`UNITS`).

Example formulas refer to the cells of one small sheet, :data:`EXAMPLE_SHEET`
(a model in B1, a distortion in B2, data ranges in D:X). The tests build
that sheet with :func:`write_example_workbook`, put every example formula in
it and recalculate it headless; each must give a value, not an error.

A new published function needs an entry in :data:`EXAMPLES` (the tests fail
without one) and, to be listed under its purpose, in :data:`GROUPS`.
After changing a description or a help text, regenerate the committed file::

    python -m layerwise.addin.reference --write
"""
from __future__ import annotations

import argparse
import re
import sys
from pathlib import Path

from .functions import FUNCTIONS, describe_functions

__all__ = [
    "GROUPS", "EXAMPLES", "UNITS", "EXAMPLE_SHEET", "EXAMPLE_COLUMN", "REFERENCE_PATH", "render_reference",
    "example_cells", "fill_example_sheet", "write_example_workbook", "reference_main",
]

REFERENCE_PATH = Path(__file__).with_name("REFERENCE.md")

# Purpose -> functions, in the order the reference lists them.
GROUPS: dict[str, tuple[str, ...]] = {
    "Building models": (
        "LW_SEVERITY", "LW_FREQUENCY", "LW_MODEL_FREQSEV", "LW_MODEL_YEARLOSS", "LW_MODEL_YEAREVENT",
        "LW_MODEL_SCENARIOS",
    ),
    "Distortions": ("LW_DISTORTION", "LW_DISTORTION_BLEND", "LW_DISTORTION_TABLE", "LW_DISTORTION_VALUE"),
    "Layer values": (
        "LW_EXPECTED_LOSS", "LW_PREMIUM", "LW_MARGIN", "LW_LOSS_RATIO", "LW_RATE_ON_LINE", "LW_CAPITAL",
        "LW_RETURN_ON_CAPITAL", "LW_LAYER_STAT", "LW_REINSTATEMENT_PREMIUM", "LW_GROSS_PREMIUM",
    ),
    "Tables": (
        "LW_TOWER", "LW_SENSITIVITY", "LW_REINSTATEMENT_TABLE", "LW_MODEL_INFO", "LW_CACHE_INFO",
    ),
    "Capital and calibration": (
        "LW_PORTFOLIO", "LW_CALIBRATE", "LW_CALIBRATION", "LW_TARGET_TOWER", "LW_IMPLIED_PARAMETER",
        "LW_IMPLIED_SPREAD", "LW_ALLOCATE_LAYERS", "LW_ALLOCATE_UNITS",
    ),
}
_OTHER = "Other functions"

# One example formula per published function, on the sheet EXAMPLE_SHEET describes.
EXAMPLES: dict[str, str] = {
    "LW_SEVERITY": '=LW_SEVERITY("lognormal", 2000000, 2.5)',
    "LW_FREQUENCY": '=LW_FREQUENCY("negative_binomial", 5, 0.6)',
    "LW_MODEL_FREQSEV": "=LW_MODEL_FREQSEV(B7, B6)",
    "LW_MODEL_YEARLOSS": "=LW_MODEL_YEARLOSS(D2:D21)",
    "LW_MODEL_YEAREVENT": "=LW_MODEL_YEAREVENT(F2:F31, G2:G31, 20)",
    "LW_MODEL_SCENARIOS": "=LW_MODEL_SCENARIOS(I2:I5, J2:J5)",
    "LW_DISTORTION": '=LW_DISTORTION("ph", 0.8)',
    "LW_DISTORTION_BLEND": "=LW_DISTORTION_BLEND(R2:R3, S2:S3)",
    "LW_DISTORTION_TABLE": "=LW_DISTORTION_TABLE(L2:L5, M2:M5)",
    "LW_DISTORTION_VALUE": "=LW_DISTORTION_VALUE(B2, 0.01)",
    "LW_EXPECTED_LOSS": "=LW_EXPECTED_LOSS(B1, 5000000, 10000000)",
    "LW_PREMIUM": "=LW_PREMIUM(B1, 5000000, 10000000, B2)",
    "LW_MARGIN": '=LW_MARGIN(B5, 1000000, "unlimited", "ph 0.7")',
    "LW_LOSS_RATIO": "=LW_LOSS_RATIO(B4, 1000000, 4000000, B2)",
    "LW_RATE_ON_LINE": '=LW_RATE_ON_LINE(B1, 5000000, 10000000, B2, 1, "occurrence", 2)',
    "LW_CAPITAL": "=LW_CAPITAL(B3, 10000000, 20000000, B2)",
    "LW_RETURN_ON_CAPITAL": '=LW_RETURN_ON_CAPITAL(B1, 5000000, 10000000, "wang 0.4", 0.5, "occurrence", 1)',
    "LW_LAYER_STAT": '=LW_LAYER_STAT(B1, 5000000, 10000000, "tvar", 0.99)',
    "LW_REINSTATEMENT_PREMIUM": "=LW_REINSTATEMENT_PREMIUM(B1, 5000000, 10000000, B2, X2:X3)",
    "LW_GROSS_PREMIUM": "=LW_GROSS_PREMIUM(LW_PREMIUM(B1, 5000000, 10000000, B2), 0.1, 0.05)",
    "LW_TOWER": "=LW_TOWER(B1, 5000000, O2:O4, B2)",
    "LW_SENSITIVITY": "=LW_SENSITIVITY(B1, 5000000, O2:O4, B2)",
    "LW_REINSTATEMENT_TABLE": "=LW_REINSTATEMENT_TABLE(B1, 5000000, 10000000, B2, X2:X3)",
    "LW_MODEL_INFO": "=LW_MODEL_INFO(B1)",
    "LW_CACHE_INFO": "=LW_CACHE_INFO()",
    "LW_PORTFOLIO": '=LW_PORTFOLIO(B1, B2, "tvar", 0.99)',
    "LW_CALIBRATE": '=LW_CALIBRATE(B1, 0.12, "var", 0.99, "ph")',
    "LW_CALIBRATION": '=LW_CALIBRATION(B3, 0.12, "var", 0.99, "ph, wang")',
    "LW_TARGET_TOWER": '=LW_TARGET_TOWER(B1, 5000000, O2:O4, 0.12, "var", 0.99, "wang")',
    "LW_IMPLIED_PARAMETER": '=LW_IMPLIED_PARAMETER(B1, 5000000, 10000000, 2500000, "wang")',
    "LW_IMPLIED_SPREAD": "=LW_IMPLIED_SPREAD(B1, 5000000, O2:O4, 1, 2500000)",
    "LW_ALLOCATE_LAYERS": '=LW_ALLOCATE_LAYERS(B3, B2, "var", 0.99, {5000000;20000000})',
    "LW_ALLOCATE_UNITS": '=LW_ALLOCATE_UNITS(U1:V21, B2, "var", 0.99)',
}

# Unit (or kind) of each argument's values, by argument name; (function, argument) entries override.
UNITS: dict = {
    "model": "reference text", "frequency": "reference text", "severity": "reference text",
    "distortion": "reference text", "distortions": "reference texts (range)", "units": "references, or currency units (range)",
    "attachment": "currency units", "limit": "currency units", "agg_deductible": "currency units",
    "attachments": "currency units (range or number)", "limits": "currency units (range)",
    "agg_deductibles": "currency units (range or number)", "bucket": "currency units",
    "losses": "currency units (range)", "outcomes": "currency units (range)", "breaks": "currency units (range)",
    "technical": "currency units", "price": "currency units, or a rate on line",
    "share": "fraction", "shares": "fractions (range or number)", "brokerage": "fraction", "expenses": "fraction",
    "target_return": "fraction", "rates": "fractions (range)", "weights": "weights (range)",
    "probabilities": "probabilities (range)", "s": "probabilities", "g": "probabilities (range)",
    "level": "probability", "reinstatements": "count", "n_years": "count", "grid_length": "count",
    "years": "year numbers (range)", "market_layer": "position",
    "family": "word", "families": "words", "basis": "word", "method": "word", "statistic": "word",
    "standard": "word", "quote": "word", "measure": "word", "quantity": "word", "columns": "column names",
    "names": "texts", "require_concave": "TRUE or FALSE", "value": "number",
    "param1": "number", "param2": "number", "param3": "number", "param4": "number",
    ("LW_DISTORTION_VALUE", "s"): "probability (or range)",
    ("LW_DISTORTION_TABLE", "s"): "probabilities (range)",
    ("LW_DISTORTION", "family"): "word or typed form",
    ("LW_PORTFOLIO", "level"): "probability, or currency units", ("LW_CALIBRATE", "level"): "probability, or currency units",
    ("LW_CALIBRATION", "level"): "probability, or currency units", ("LW_TARGET_TOWER", "level"): "probability, or currency units",
    ("LW_ALLOCATE_LAYERS", "level"): "probability, or currency units", ("LW_ALLOCATE_UNITS", "level"): "probability, or currency units",
    ("LW_GROSS_PREMIUM", "technical"): "currency units (or range)",
    ("LW_TOWER", "reinstatements"): "counts (range or number)", ("LW_SENSITIVITY", "reinstatements"): "counts (range or number)",
    ("LW_TARGET_TOWER", "reinstatements"): "counts (range or number)", ("LW_IMPLIED_SPREAD", "reinstatements"): "counts (range or number)",
}

# The example sheet: (cell, content, what it holds). Contents starting with "=" are formulas.
_LOSSES = [0, 1_250_000, 320_000, 7_400_000, 2_600_000, 0, 11_800_000, 450_000, 930_000, 5_900_000,
           1_700_000, 0, 3_300_000, 24_500_000, 610_000, 2_050_000, 0, 4_800_000, 1_150_000, 8_700_000]
_EVENTS = [(1, 400_000), (1, 850_000), (2, 1_200_000), (4, 6_300_000), (4, 300_000), (5, 2_100_000),
           (6, 750_000), (7, 13_500_000), (7, 900_000), (7, 450_000), (8, 3_800_000), (9, 1_600_000),
           (10, 500_000), (11, 2_900_000), (11, 8_200_000), (12, 640_000), (13, 1_050_000), (13, 4_400_000),
           (14, 27_000_000), (15, 350_000), (15, 1_900_000), (16, 720_000), (16, 5_600_000), (17, 980_000),
           (18, 2_300_000), (18, 400_000), (19, 9_100_000), (19, 1_300_000), (20, 600_000), (20, 3_100_000)]
_UNIT2 = [200_000, 0, 1_900_000, 650_000, 3_300_000, 120_000, 0, 5_400_000, 880_000, 260_000,
          1_450_000, 9_800_000, 0, 2_200_000, 410_000, 760_000, 3_900_000, 0, 1_250_000, 540_000]


def _build_sheet() -> list[tuple[str, object, str]]:
    rows = [
        ("B1", '=LW_MODEL_FREQSEV("poisson 5", "lognormal 2e6 2.5")', "a frequency-severity model: Poisson 5 claims, lognormal severity of mean 2,000,000 and cv 2.5"),
        ("B2", '=LW_DISTORTION("wang", 0.4)', "a distortion"),
        ("B3", "=LW_MODEL_YEARLOSS(D2:D21)", "a year loss model of 20 years (column D)"),
        ("B4", "=LW_MODEL_YEAREVENT(F2:F31, G2:G31, 20)", "a year-event model of 30 events in 20 years (columns F, G)"),
        ("B5", "=LW_MODEL_SCENARIOS(I2:I5, J2:J5)", "a scenario model of 4 outcomes (columns I, J)"),
        ("B6", '=LW_SEVERITY("lognormal", 2000000, 2.5)', "a severity: mean 2,000,000, cv 2.5"),
        ("B7", '=LW_FREQUENCY("poisson", 5)', "a claim count: Poisson, mean 5"),
        ("D1", "annual loss", "D2:D21: 20 simulated annual losses"),
        ("F1", "year", "F2:F31: the simulated year (1 to 20) of each event"),
        ("G1", "event loss", "G2:G31: the loss of each event"),
        ("I1", "outcome", "I2:I5: annual loss of each scenario: 0; 2,000,000; 10,000,000; 50,000,000"),
        ("J1", "probability", "J2:J5: their probabilities: 0.7; 0.2; 0.08; 0.02"),
        ("L1", "s", "L2:L5: survival probabilities 0; 0.1; 0.5; 1"),
        ("M1", "g(s)", "M2:M5: distorted probabilities 0; 0.3; 0.75; 1"),
        ("O1", "limit", "O2:O4: tower limits 5,000,000; 10,000,000; 25,000,000"),
        ("R1", "distortion", "R2:R3: 'wang 0.4' and 'tvar 0.99'"),
        ("S1", "weight", "S2:S3: their blend weights 0.7 and 0.3"),
        ("U1", "property", "U1:V21: two units' annual losses, with a header row of names (U is column D's losses)"),
        ("V1", "marine", ""),
        ("X1", "rate", "X2:X3: paid reinstatement rates 1 (100%) and 0.5"),
    ]
    for i, x in enumerate(_LOSSES, start=2):
        rows.append((f"D{i}", x, ""))
        rows.append((f"U{i}", x, ""))
        rows.append((f"V{i}", _UNIT2[i - 2], ""))
    for i, (y, x) in enumerate(_EVENTS, start=2):
        rows += [(f"F{i}", y, ""), (f"G{i}", x, "")]
    for i, (x, p) in enumerate([(0, 0.7), (2e6, 0.2), (1e7, 0.08), (5e7, 0.02)], start=2):
        rows += [(f"I{i}", x, ""), (f"J{i}", p, "")]
    for i, (s, g) in enumerate([(0, 0), (0.1, 0.3), (0.5, 0.75), (1, 1)], start=2):
        rows += [(f"L{i}", s, ""), (f"M{i}", g, "")]
    for i, x in enumerate([5e6, 10e6, 25e6], start=2):
        rows.append((f"O{i}", x, ""))
    rows += [("R2", "wang 0.4", ""), ("R3", "tvar 0.99", ""), ("S2", 0.7, ""), ("S3", 0.3, ""),
             ("X2", 1, ""), ("X3", 0.5, "")]
    return rows


EXAMPLE_SHEET: tuple[tuple[str, object, str], ...] = tuple(_build_sheet())
EXAMPLE_COLUMN = "AB"  # write_example_workbook puts the examples here, the function names in column AA


# =========================================================================== rendering
def _groups() -> dict[str, list[dict]]:
    described = {d["name"]: d for d in describe_functions()}
    out: dict[str, list[dict]] = {}
    placed = set()
    for group, names in GROUPS.items():
        out[group] = [described[n] for n in names if n in described]
        placed.update(names)
    rest = [d for n, d in described.items() if n not in placed]
    if rest:
        out[_OTHER] = rest
    return {g: ds for g, ds in out.items() if ds}


def _cell(text) -> str:
    """Text for a Markdown table cell."""
    return str(text).replace("|", "\\|").replace("\n", " ")


_EMPTY_RE = re.compile(r"\bempty(?: cell)?\s*=\s*")
_DEFAULT_RE = re.compile(r"'?(?P<what>[\w.%]+)'?\s*\((?:[^()]*,\s*)?(?:the\s+)?default\)")


def _clause(text: str) -> str:
    """``text`` up to the end of its clause: "; ", ": ", ". ", an unbalanced ")" or the end."""
    depth = 0
    for i, ch in enumerate(text):
        nxt = text[i + 1: i + 2]
        if ch == "(":
            depth += 1
        elif ch == ")":
            if depth == 0:
                return text[:i].strip()
            depth -= 1
        elif ch in ";:" and nxt in (" ", ""):
            return text[:i].strip()
        elif ch == "." and nxt == " " and text[max(i - 2, 0): i] != "..":
            return text[:i].strip()
    text = text.strip()
    return text[:-1] if text.endswith(".") and not text.endswith("...") else text


def default_text(help_text: str) -> str | None:
    """What an empty cell means for an optional argument, read from its help text (None: the text does not say)."""
    m = _EMPTY_RE.search(help_text)
    if m:
        return _clause(help_text[m.end():])
    m = _DEFAULT_RE.search(help_text)
    if m:
        return m.group("what")
    if re.search(r"\bempty (?:if|otherwise)\b", help_text):
        return "none"
    return None


def unit_of(function: str, argument: str) -> str:
    return UNITS.get((function, argument)) or UNITS.get(argument) or "see help"


def _returns(d: dict) -> str:
    desc = d["description"].lower()
    if d["returns"] == "table" and any("same shape" in t for t in [desc] + [a["help"] for a in d["args"]]):
        return "one value, or for a range argument a range of values of its shape (spilled from the cell)"
    if d["returns"] == "table":
        return "a table: a header row, then one row per record, spilled from the cell (enter as an array formula where dynamic arrays are missing)"
    if "reference" in desc:
        return "a reference text, to pass to other LW_ functions"
    return "one value"


def _signature(d: dict) -> str:
    parts = [f"[{a['name']}]" if a["optional"] else a["name"] for a in d["args"]]
    return f"{d['name']}({', '.join(parts)})"


def _anchor(name: str) -> str:
    return name.lower()


def _render_function(d: dict) -> list[str]:
    name = d["name"]
    lines = [f"### {name}", "", d["description"], "", f"`{_signature(d)}`", ""]
    if d["args"]:
        lines += ["| argument | unit | default | help |", "| --- | --- | --- | --- |"]
        for a in d["args"]:
            if a["optional"]:
                meaning = default_text(a["help"])
                default = f"empty = {meaning}" if meaning else "optional"
            else:
                default = "required"
            lines.append(f"| `{a['name']}` | {_cell(unit_of(name, a['name']))} | {_cell(default)} | {_cell(a['help'])} |")
        lines.append("")
    else:
        lines += ["No arguments.", ""]
    lines.append(f"Returns {_returns(d)}." + (" Recalculated on every change (volatile)." if d["volatile"] else ""))
    lines.append("")
    example = EXAMPLES.get(name)
    lines.append(f"Example: `{example}`" if example else "Example: (none yet)")
    lines.append("")
    return lines


def render_reference() -> str:
    """The function reference as Markdown (what addin/REFERENCE.md holds)."""
    groups = _groups()
    n = sum(len(ds) for ds in groups.values())
    out = [
        "# layerwise worksheet functions",
        "",
        "<!-- Generated by `python -m layerwise.addin.reference --write` from the functions' metadata; do not edit. -->",
        "",
        f"{n} functions, in the function dialog's category *layerwise*. The descriptions and argument help texts",
        "below are the ones Excel's function dialog shows.",
        "",
        "Conventions. Amounts are in the model's currency units and probabilities are annual. An empty cell (or an",
        "omitted optional argument) means the default. A builder (LW_MODEL_..., LW_DISTORTION, LW_SEVERITY,",
        "LW_FREQUENCY) returns a reference text that other cells pass on; typed forms such as `\"wang 0.4\"`,",
        "`\"poisson 5\"` or `\"freqsev(poisson 5, lognormal 2e6 2.5)\"` work wherever a reference is expected.",
        "Bad input never raises: the cell shows a text error value such as",
        "`#VALUE! LW_PREMIUM(limit): must lie in (0, inf], got -5`, and functions given such a value pass it on.",
        "Layer terms: `attachment`, `limit` (a number or `\"unlimited\"`), then optional `share`, `basis`,",
        "`reinstatements` and `agg_deductible`; the basis defaults to per occurrence for frequency-severity and",
        "year-event models and to the annual total for year loss and scenario tables.",
        "",
        "## Contents",
        "",
    ]
    for group, ds in groups.items():
        out.append(f"- {group}: " + ", ".join(f"[{d['name']}](#{_anchor(d['name'])})" for d in ds))
    out += [
        "",
        "## The example sheet",
        "",
        "Each example formula refers to cells of one sheet laid out as below (the tests build it, enter every",
        "example and recalculate it).",
        "",
        "| cell | what | formula or header |",
        "| --- | --- | --- |",
    ]
    for cell, content, what in EXAMPLE_SHEET:
        if what:
            shown = f"`{content}`" if isinstance(content, str) and content.startswith("=") else _cell(content)
            out.append(f"| {cell} | {_cell(what)} | {shown} |")
    out.append("")
    for group, ds in groups.items():
        out += [f"## {group}", ""]
        for d in ds:
            out += _render_function(d)
    return "\n".join(out).rstrip("\n") + "\n"


# =========================================================================== the example workbook
def example_cells() -> dict[str, str]:
    """Cell (in :data:`EXAMPLE_COLUMN`) -> example formula, one per published function with an example, in name order."""
    names = [n for n in FUNCTIONS if n in EXAMPLES]
    return {f"{EXAMPLE_COLUMN}{i}": EXAMPLES[n] for i, n in enumerate(names, start=1)}


def write_example_workbook(path) -> Path:
    """Write the example sheet with every example formula in column AB (function names in AA); return the path."""
    import openpyxl

    path = Path(path)
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Examples"
    fill_example_sheet(ws)
    path.parent.mkdir(parents=True, exist_ok=True)
    wb.save(path)
    return path


def fill_example_sheet(ws) -> None:
    """Write :data:`EXAMPLE_SHEET` and every example formula (column AB, names in AA) into an openpyxl worksheet."""
    for cell, content, what in EXAMPLE_SHEET:
        ws[cell] = content
        if what and cell.startswith("B"):
            ws[cell.replace("B", "A", 1)] = what
    names = [n for n in FUNCTIONS if n in EXAMPLES]
    for (cell, formula), name in zip(example_cells().items(), names):
        ws[cell] = formula
        ws[cell.replace(EXAMPLE_COLUMN, "AA", 1)] = name


# =========================================================================== command line
def reference_main(argv=None) -> int:
    """``reference [--write | --check] [--path PATH]``: print the reference, write it, or check the file is current."""
    parser = argparse.ArgumentParser(prog="layerwise reference",
                                     description="The worksheet function reference (Markdown), from the functions' metadata.")
    mode = parser.add_mutually_exclusive_group()
    mode.add_argument("--write", action="store_true", help="write it to the file instead of printing it")
    mode.add_argument("--check", action="store_true", help="exit with status 1 if the file is not current")
    parser.add_argument("--path", default=str(REFERENCE_PATH), help=f"the file (default: {REFERENCE_PATH})")
    args = parser.parse_args(argv)
    text = render_reference()
    path = Path(args.path)
    if args.write:
        path.write_text(text, encoding="utf-8")
        print(path)
        return 0
    if args.check:
        current = path.exists() and path.read_text(encoding="utf-8") == text
        print(f"{path} is {'current' if current else 'out of date: run with --write'}")
        return 0 if current else 1
    sys.stdout.write(text)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(reference_main())
