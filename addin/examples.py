"""Example workbooks, built with openpyxl from invented data.

Each example is an :class:`Example`: a function that builds the workbook, the
same loss model built directly with :mod:`layerwise.engine`, and the *key
cells* (one per priced quantity and layer) with the layer terms and distortion
behind them, so tests (and ``layerwise demo``) can check every key cell
against a direct engine call and print the priced tower.

Layout conventions shared by every example:

* a title, a one-line description naming the units, and a visible caution note;
* input cells shaded (see :data:`INPUT_FILL`) with a dotted border, and a legend;
* key results in ordinary one-cell formulas, one row per layer, every argument
  written out (the ``formulas`` library passes an omitted middle argument as 0);
* a spilled ``LW_TOWER`` table only as an extra: it is an array formula, which
  programs without layerwise recalculate (LibreOffice then shows ``#NAME?``).

Everything here is invented: no real company, portfolio, place or event.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from openpyxl import Workbook, load_workbook
from openpyxl.styles import Alignment, Border, PatternFill, Side
from openpyxl.styles import Font as _Font
from openpyxl.utils import get_column_letter
from openpyxl.worksheet.datavalidation import DataValidation
from openpyxl.worksheet.formula import ArrayFormula

import layerwise.engine as lw
from layerwise.engine.distortions import TVaRDistortion

from . import demo_data

__all__ = [
    "CAUTION", "EXAMPLES", "Example", "KeyCell", "build_examples", "workbook_contents", "compare_contents",
    "example_for",
]

CUR = demo_data.DEMO_CURRENCY
CAUTION = (
    "Caution: a technical price from the loss model and distortion on this sheet, not a quote, an offer of "
    "cover or advice. Check it against local regulation and have it reviewed with licensed actuarial "
    "judgement before anyone relies on it. All data are invented."
)

# ------------------------------------------------------------------ styling (plain, our own)
FONT_NAME = "Calibri"  # named everywhere: a font without a name shows as a serif in some programs


def Font(**kw) -> _Font:
    return _Font(name=FONT_NAME, **{"size": 11, **kw})


AMOUNT = "#,##0"
RATIO = "0.0%"
PROB = "0.00%"
PARAM = "0.0000"
COUNT = "#,##0"
INPUT_FILL = PatternFill("solid", fgColor="E3EFEA")  # pale sage: cells you may change
_INPUT_SIDE = Side(style="dotted", color="6F8F84")
_INPUT_BORDER = Border(left=_INPUT_SIDE, right=_INPUT_SIDE, top=_INPUT_SIDE, bottom=_INPUT_SIDE)
_HEAD_FILL = PatternFill("solid", fgColor="404C57")
_HEAD_FONT = Font(bold=True, color="FFFFFF")
_BLOCK_FILL = PatternFill("solid", fgColor="D9DEE3")
_NOTE_FILL = PatternFill("solid", fgColor="F6F1E7")
_NOTE_FONT = Font(italic=True, color="4D4D4D", size=9)
_CAUTION_FONT = Font(bold=True, color="7A2E12", size=9)
_TITLE_FONT = Font(bold=True, size=14)
_SUB_FONT = Font(color="555555")
_RESULT_FONT = Font(bold=True)
_TOTAL_SIDE = Side(style="thin", color="404C57")
_TOTAL_BORDER = Border(top=_TOTAL_SIDE, bottom=Side(style="double", color="404C57"))
_WRAP = Alignment(wrap_text=True, vertical="top")
FAMILY_NAMES = "wang,proportional_hazard,dual_power,tvar,cost_of_capital"
_DATA_HEADER = 3  # header row of the data sheets; data start below it


@dataclass(frozen=True)
class KeyCell:
    """A cell that must equal ``price_layers(model, [layer], distortion)[quantity]`` (distortion None: g(s)=s),
    or, when ``engine`` is given, ``engine(model)`` (for portfolio figures, calibrations and allocations)."""

    cell: str
    quantity: str
    layer: lw.Layer | None = None
    distortion: lw.Distortion | None = None
    engine: Callable | None = field(default=None, compare=False)

    def expected(self, model) -> float:
        if self.engine is not None:
            return float(self.engine(model))
        g = self.distortion if self.distortion is not None else TVaRDistortion(0.0)
        return float(lw.price_layers(model, [self.layer], g).iloc[0][self.quantity])


@dataclass(frozen=True)
class Example:
    """One example workbook: how to build it, its engine model and the cells to check.

    ``make()`` returns the workbook and its key cells; ``build()`` just the workbook.
    """

    name: str
    filename: str
    title: str
    description: str
    make: Callable[[], tuple[Workbook, list[KeyCell]]]
    model: Callable[[], lw.LossModel]
    table: str = ""  # the per-layer results (header row first), e.g. "Tower!A16:M22"
    table_columns: tuple[str, ...] = ()  # headers shown in the terminal summary; empty = all
    text_cells: dict = field(default_factory=dict)  # cell -> expected start of its text (e.g. a reference)

    def build(self) -> Workbook:
        return self.make()[0]

    @functools.cached_property
    def key_cells(self) -> tuple[KeyCell, ...]:
        return tuple(self.make()[1])


# ------------------------------------------------------------------ sheet helpers
class _Sheet:
    """Small helpers that write labelled, styled cells on one worksheet."""

    def __init__(self, ws, widths: dict[str, float]):
        self.ws = ws
        for col, w in widths.items():
            ws.column_dimensions[col].width = w
        ws.sheet_view.showGridLines = False

    def heading(self, title: str, subtitle: str, last_col: str, caution_row: int = 3):
        ws = self.ws
        ws["A1"] = title
        ws["A1"].font = _TITLE_FONT
        ws["A2"] = subtitle
        ws["A2"].font = _SUB_FONT
        ws.merge_cells(f"A2:{last_col}2")
        ws["A2"].alignment = _WRAP
        ws.row_dimensions[2].height = 30 if len(subtitle) > 110 else 16
        ws.merge_cells(f"A{caution_row}:{last_col}{caution_row}")
        c = ws[f"A{caution_row}"]
        c.value = CAUTION
        c.font = _CAUTION_FONT
        c.fill = _NOTE_FILL
        c.alignment = _WRAP
        ws.row_dimensions[caution_row].height = 30

    def legend(self, cell: str, text_cell: str):
        self.input(cell, "input")
        self.ws[cell].alignment = Alignment(horizontal="center")
        self.note(text_cell, "Shaded cells are inputs: change them here, or try what-ifs with "
                             "layerwise price BOOK --set SHEET!CELL=VALUE")

    def label(self, cell: str, text: str, *, bold: bool = False):
        self.ws[cell] = text
        if bold:
            self.ws[cell].font = Font(bold=True)

    def input(self, cell: str, value, fmt: str | None = None):
        c = self.ws[cell]
        c.value = value
        c.fill = INPUT_FILL
        c.border = _INPUT_BORDER
        if fmt:
            c.number_format = fmt
        return c

    def formula(self, cell: str, text: str, fmt: str | None = None, *, bold: bool = False):
        c = self.ws[cell]
        c.value = text
        if fmt:
            c.number_format = fmt
        if bold:
            c.font = _RESULT_FONT
        return c

    def note(self, cell: str, text: str, *, merge_to: str | None = None, height: float | None = None):
        c = self.ws[cell]
        c.value = text
        c.font = _NOTE_FONT
        c.alignment = Alignment(indent=1, wrap_text=merge_to is not None, vertical="top")
        if merge_to:
            self.ws.merge_cells(f"{cell}:{merge_to}")
        if height:
            self.ws.row_dimensions[c.row].height = height

    def header_row(self, row: int, first_col: int, names: list[str]):
        for j, name in enumerate(names):
            c = self.ws.cell(row, first_col + j, name)
            c.fill = _HEAD_FILL
            c.font = _HEAD_FONT
            c.alignment = Alignment(horizontal="center", vertical="center", wrap_text=True)
        self.ws.row_dimensions[row].height = 30

    def block_title(self, row: int, first_col: int, last_col: int, text: str):
        ws = self.ws
        ws.merge_cells(start_row=row, start_column=first_col, end_row=row, end_column=last_col)
        c = ws.cell(row, first_col, text)
        c.fill = _BLOCK_FILL
        c.font = Font(bold=True)
        c.alignment = Alignment(horizontal="center")

    def total_style(self, row: int, first_col: int, last_col: int):
        for j in range(first_col, last_col + 1):
            c = self.ws.cell(row, j)
            c.border = _TOTAL_BORDER
            c.font = _RESULT_FONT

    def choices(self, cells: str, options: str):
        dv = DataValidation(type="list", formula1=f'"{options}"', allow_blank=False)
        dv.error = "Choose one of the listed values."
        self.ws.add_data_validation(dv)
        dv.add(cells)


def _layer_terms(layer: lw.Layer) -> tuple[float, float, float, object]:
    rein = layer.reinstatements
    return layer.attachment, layer.limit, layer.share, ("unlimited" if rein is None or math.isinf(rein) else int(rein))


def _page(ws, *, landscape: bool = True, area: str | None = None):
    ws.page_setup.orientation = "landscape" if landscape else "portrait"
    ws.page_setup.fitToWidth = 1
    ws.page_setup.fitToHeight = 0
    ws.sheet_properties.pageSetUpPr.fitToPage = True
    if area:
        ws.print_area = area


# Per-layer result columns shared by the tower sheets: (header, function, number format).
_PER_LAYER = [
    ("Expected loss", "LW_EXPECTED_LOSS", AMOUNT),
    ("Premium", "LW_PREMIUM", AMOUNT),
    ("Margin", "LW_MARGIN", AMOUNT),
    ("Loss ratio", "LW_LOSS_RATIO", RATIO),
    ("Rate on line", "LW_RATE_ON_LINE", RATIO),
    ("Capital", "LW_CAPITAL", AMOUNT),
    ("Return on capital", "LW_RETURN_ON_CAPITAL", RATIO),
]
_QUANTITY = {
    "LW_EXPECTED_LOSS": "expected_loss", "LW_PREMIUM": "premium", "LW_MARGIN": "margin",
    "LW_LOSS_RATIO": "loss_ratio", "LW_RATE_ON_LINE": "rate_on_line", "LW_CAPITAL": "capital",
    "LW_RETURN_ON_CAPITAL": "return_on_capital",
}


def _layer_formula(fn: str, model: str, a: str, l: str, dist: str, share: str, basis: str, rein: str) -> str:
    if fn == "LW_EXPECTED_LOSS":
        return f"={fn}({model}, {a}, {l}, {share}, {basis}, {rein})"
    return f"={fn}({model}, {a}, {l}, {dist}, {share}, {basis}, {rein})"


def _tower_rows(s: _Sheet, *, sheet: str, first_row: int, layers: list[lw.Layer], model_cell: str,
                dist_cell: str, basis_cell: str, g: lw.Distortion, keys: list, prob_attach: bool = True) -> int:
    """Write the per-layer tower table from ``first_row`` (header) down; returns the totals row."""
    heads = ["Layer", f"Attachment ({CUR})", f"Limit ({CUR})", "Share", "Reinstatements"]
    heads += [f"{h} ({CUR})" if fmt == AMOUNT else h for h, _, fmt in _PER_LAYER]
    if prob_attach:
        heads.append("Prob. of a loss to the layer")
    s.header_row(first_row, 1, heads)
    r0 = first_row + 1
    for i, lay in enumerate(layers):
        r = r0 + i
        a, lim, share, rein = _layer_terms(lay)
        s.label(f"A{r}", f"Layer {i + 1}", bold=True)
        s.input(f"B{r}", a, AMOUNT)
        s.input(f"C{r}", lim, AMOUNT)
        s.input(f"D{r}", share, RATIO)
        s.input(f"E{r}", rein, "0")
        s.ws[f"E{r}"].alignment = Alignment(horizontal="right")
        refs = dict(model=model_cell, a=f"B{r}", l=f"C{r}", dist=dist_cell, share=f"D{r}", basis=basis_cell, rein=f"E{r}")
        for j, (_, fn, fmt) in enumerate(_PER_LAYER):
            col = get_column_letter(6 + j)
            s.formula(f"{col}{r}", _layer_formula(fn, **refs), fmt, bold=fn == "LW_PREMIUM")
            q = _QUANTITY[fn]
            keys.append(KeyCell(f"{sheet}!{col}{r}", q, lay, None if fn == "LW_EXPECTED_LOSS" else g))
        if prob_attach:
            col = get_column_letter(6 + len(_PER_LAYER))
            s.formula(f"{col}{r}", f'=LW_LAYER_STAT({model_cell}, B{r}, C{r}, "prob_attach", "", D{r}, {basis_cell}, E{r})', PROB)
            keys.append(KeyCell(f"{sheet}!{col}{r}", "prob_attach", lay, None))
    rt = r0 + len(layers)
    r1 = rt - 1
    s.label(f"A{rt}", "Tower", bold=True)
    for col, fmt in (("F", AMOUNT), ("G", AMOUNT), ("H", AMOUNT), ("K", AMOUNT)):
        s.formula(f"{col}{rt}", f"=SUM({col}{r0}:{col}{r1})", fmt)
    s.formula(f"I{rt}", f"=F{rt}/G{rt}", RATIO)
    s.formula(f"L{rt}", f"=H{rt}/K{rt}", RATIO)
    s.total_style(rt, 1, 5 + len(_PER_LAYER) + int(prob_attach))
    return rt


def _distortion_inputs(s: _Sheet, row: int, family: str, value: float) -> str:
    """Family and parameter inputs on rows ``row`` and ``row + 1``, the reference on ``row + 2``; returns its cell."""
    s.label(f"A{row}", "Distortion family")
    s.input(f"B{row}", family)
    s.choices(f"B{row}", FAMILY_NAMES)
    s.note(f"C{row}", "wang, proportional_hazard, dual_power, tvar or cost_of_capital")
    s.label(f"A{row + 1}", "Distortion parameter")
    s.input(f"B{row + 1}", value, PARAM)
    s.note(f"C{row + 1}", "wang lam >= 0; ph r in (0, 1]; dual_power m >= 1; tvar p in [0, 1); cost_of_capital roe >= 0")
    s.label(f"A{row + 2}", "Distortion (reference)")
    s.formula(f"B{row + 2}", f"=LW_DISTORTION(B{row}, B{row + 1})")
    return f"$B${row + 2}"


def _extra_tower(s: _Sheet, row: int, model: str, atts: str, lims: str, dist: str, shares: str, basis: str,
                 reins: str, n_layers: int, columns: list[str]):
    s.label(f"A{row}", "The same tower from one LW_TOWER call (a spilled table)", bold=True)
    s.note(f"A{row + 1}", "An array formula: Excel with the add-in and layerwise's priced copies show it; programs "
                          "without layerwise recalculate array formulas and may show #NAME? here. The figures above "
                          "are ordinary cells.")
    top = row + 2
    last = get_column_letter(len(columns))
    s.ws[f"A{top}"] = ArrayFormula(
        f"A{top}:{last}{top + n_layers}",
        f'=LW_TOWER({model}, {atts}, {lims}, {dist}, {shares}, {basis}, {reins}, "", "{",".join(columns)}")',
    )
    for j, name in enumerate(columns):
        fmt = {"expected_loss": AMOUNT, "premium": AMOUNT, "capital": AMOUNT, "margin": AMOUNT,
               "rate_on_line": RATIO, "loss_ratio": RATIO, "return_on_capital": RATIO}.get(name)
        for r in range(top + 1, top + n_layers + 1):
            if fmt:
                s.ws.cell(r, j + 1).number_format = fmt


# ------------------------------------------------------------------ (a) property-catastrophe tower
CAT_YEARS = 2_000
CAT_TOWER = [  # (attachment, limit, reinstatements): per occurrence
    (10e6, 15e6, 2), (25e6, 25e6, 1), (50e6, 50e6, 1), (100e6, 100e6, 1), (200e6, 150e6, 0),
]
CAT_DISTORTION = ("wang", 0.35)


def _cat_events():
    return demo_data.storm_year_event_table(CAT_YEARS)


def _cat_layers():
    return [lw.Layer.occurrence(a, l, reinstatements=r) for a, l, r in CAT_TOWER]


def _cat_model():
    ev = _cat_events()
    return lw.YearEventTable(ev["year"].to_numpy(float), ev["loss"].to_numpy(float), CAT_YEARS)


def _cat_build() -> tuple[Workbook, list[KeyCell]]:
    keys: list[KeyCell] = []
    ev = _cat_events()
    n = len(ev)
    wb = Workbook()
    ws = wb.active
    ws.title = "Tower"
    s = _Sheet(ws, {"A": 24, "B": 16, "C": 16, "D": 9, "E": 15, "F": 15, "G": 15, "H": 14, "I": 10,
                    "J": 10, "K": 15, "L": 12, "M": 13})
    s.heading("Property catastrophe occurrence tower",
              f"Priced from a simulated year-event table of an invented windstorm portfolio ({n:,} events in "
              f"{CAT_YEARS:,} years, sheet Events). Amounts in {CUR}; each layer pays per occurrence, with "
              "reinstatements limiting what it pays in a year.", "M")
    s.legend("A4", "B4")
    s.label("A6", "Loss model", bold=True)
    s.note("C6", "built from the Events sheet; the pricing cells below refer to it")
    s.label("A7", "Simulated years")
    s.input("B7", CAT_YEARS, COUNT)
    s.note("C7", "years in the simulation, including years without any event")
    s.label("A8", "Layer basis")
    s.input("B8", "occurrence")
    s.choices("B8", "occurrence,aggregate")
    s.note("C8", "occurrence: each event separately; aggregate: the year's total")
    s.label("A9", "Model (reference)")
    lo, hi = _DATA_HEADER + 1, _DATA_HEADER + n
    s.formula("B9", f"=LW_MODEL_YEAREVENT(Events!A{lo}:A{hi}, Events!B{lo}:B{hi}, B7)")
    s.label("A11", "Pricing basis", bold=True)
    g = lw.make_distortion(*CAT_DISTORTION)
    dist = _distortion_inputs(s, 12, *CAT_DISTORTION)
    first = 16
    rt = _tower_rows(s, sheet="Tower", first_row=first, layers=_cat_layers(), model_cell="$B$9", dist_cell=dist,
                     basis_cell="$B$8", g=g, keys=keys)
    s.note(f"A{rt + 1}", "Capital: what the layer needs when fully collateralised (its largest annual payment "
                         "less premium). Tower row: totals of the layers; its loss ratio and return on capital are "
                         "ratios of those totals.")
    k = len(CAT_TOWER)
    _extra_tower(s, rt + 3, "$B$9", f"B{first + 1}:B{first + k}", f"C{first + 1}:C{first + k}", dist,
                 f"D{first + 1}:D{first + k}", "$B$8", f"E{first + 1}:E{first + k}", k,
                 ["layer", "expected_loss", "premium", "rate_on_line", "return_on_capital"])
    ws.freeze_panes = "A5"
    _page(ws, area=f"A1:M{rt + 4 + k}")

    d = wb.create_sheet("Events")
    ds = _Sheet(d, {"A": 10, "B": 18})
    # Notes above the data, and nothing beside it: every cell of the used rectangle costs recalculation time.
    ds.note("A1", f"Invented windstorm catalogue: {n:,} events in {CAT_YEARS:,} simulated years; years without "
                  f"events are absent. Ground-up loss per event in {CUR}.")
    ds.note("A2", "Replace these two columns with your own catalogue and widen the ranges in Tower!B9.")
    ds.header_row(_DATA_HEADER, 1, ["year", f"loss ({CUR})"])
    for i, (y, x) in enumerate(zip(ev["year"].tolist(), ev["loss"].tolist()), start=_DATA_HEADER + 1):
        d.cell(i, 1, int(y))
        d.cell(i, 2, float(x)).number_format = AMOUNT
    d.freeze_panes = f"A{_DATA_HEADER + 1}"
    return wb, keys


def _cat_example() -> Example:
    return Example(
        name="cat_tower", filename="cat_tower.xlsx", title="Property catastrophe occurrence tower",
        description="per-occurrence layers with reinstatements on a simulated year-event table",
        make=_cat_build, model=_cat_model, table="Tower!A16:M22",
        table_columns=("Layer", "Attachment", "Limit", "Reinstatements", "Expected loss", "Premium", "Loss ratio",
                       "Rate on line", "Return on capital"),
        text_cells={"Tower!B9": "yearevent#", "Tower!B14": "wang("},
    )


# ------------------------------------------------------------------ (b) casualty excess layers
CASUALTY_TOWER = [(1e6, 1e6, 2), (2e6, 3e6, 1), (5e6, 5e6, 1), (10e6, 10e6, 1), (20e6, 20e6, 0)]
CASUALTY_DISTORTION = ("proportional_hazard", 0.8)


def _casualty_model():
    a = demo_data.casualty_assumptions()
    return lw.FrequencySeverity(lw.make_frequency(*a["frequency"]), lw.make_severity(*a["severity"]))


def _casualty_layers():
    return [lw.Layer.occurrence(a, l, reinstatements=r) for a, l, r in CASUALTY_TOWER]


def _casualty_build() -> tuple[Workbook, list[KeyCell]]:
    keys: list[KeyCell] = []
    a = demo_data.casualty_assumptions()
    wb = Workbook()
    ws = wb.active
    ws.title = "Casualty"
    s = _Sheet(ws, {"A": 26, "B": 16, "C": 16, "D": 9, "E": 15, "F": 15, "G": 15, "H": 14, "I": 10,
                    "J": 10, "K": 15, "L": 12, "M": 13})
    s.heading("Casualty excess of loss layers",
              "Priced from a frequency-severity model of an invented liability account: claims a year and the "
              f"ground-up size of each claim; the annual loss of each layer by FFT. Amounts in {CUR}.", "M")
    s.legend("A4", "B4")
    s.label("A6", "Claim count", bold=True)
    s.label("A7", "Family")
    s.input("B7", a["frequency"][0])
    s.choices("B7", "poisson,negative_binomial,binomial,fixed")
    s.label("A8", "Mean claims a year")
    s.input("B8", a["frequency"][1], "0.00")
    s.label("A9", "Claim-count cv")
    s.input("B9", a["frequency"][2], "0.00")
    s.note("C9", "coefficient of variation of the count; above 1/sqrt(mean) for a negative binomial")
    s.label("A10", "Frequency (reference)")
    s.formula("B10", "=LW_FREQUENCY(B7, B8, B9)")
    s.label("A12", "Claim size (ground up)", bold=True)
    s.label("A13", "Family")
    s.input("B13", a["severity"][0])
    s.choices("B13", "lognormal,gamma,pareto,single_pareto,weibull,exponential,generalized_pareto")
    s.label("A14", f"Mean claim ({CUR})")
    s.input("B14", a["severity"][1], AMOUNT)
    s.label("A15", "Claim-size cv")
    s.input("B15", a["severity"][2], "0.00")
    s.label("A16", "Severity (reference)")
    s.formula("B16", '=LW_SEVERITY(B13, B14, B15, "", "")')
    s.label("A18", "Loss model", bold=True)
    s.note("C18", "grid spacing and size chosen automatically for each layer; the discretisation keeps the mean")
    s.label("A19", "Model (reference)")
    s.formula("B19", '=LW_MODEL_FREQSEV(B10, B16, "", "", "moment")')
    s.label("A20", "Layer basis")
    s.input("B20", "occurrence")
    s.choices("B20", "occurrence,aggregate")
    s.label("A22", "Pricing basis", bold=True)
    g = lw.make_distortion(*CASUALTY_DISTORTION)
    dist = _distortion_inputs(s, 23, *CASUALTY_DISTORTION)
    first = 27
    rt = _tower_rows(s, sheet="Casualty", first_row=first, layers=_casualty_layers(), model_cell="$B$19",
                     dist_cell=dist, basis_cell="$B$20", g=g, keys=keys)
    s.note(f"A{rt + 1}", "Reinstatements: how many times the limit is restored in a year (aggregate limit = "
                         "limit x (1 + reinstatements)); type 'unlimited' for no aggregate limit (capital is then "
                         "unbounded).")
    row = rt + 3
    s.label(f"A{row}", "Model diagnostics (LW_MODEL_INFO, a spilled table; an array formula)", bold=True)
    ws[f"A{row + 1}"] = ArrayFormula(f"A{row + 1}:B{row + 20}", "=LW_MODEL_INFO($B$19)")
    ws.freeze_panes = "A5"
    _page(ws, area=f"A1:M{row + 20}")
    return wb, keys


def _casualty_example() -> Example:
    return Example(
        name="casualty_xl", filename="casualty_xl.xlsx", title="Casualty excess of loss layers",
        description="per-occurrence excess layers on a negative binomial / lognormal model",
        make=_casualty_build, model=_casualty_model, table="Casualty!A27:M33",
        table_columns=("Layer", "Attachment", "Limit", "Expected loss", "Premium", "Loss ratio", "Rate on line",
                       "Return on capital"),
        text_cells={"Casualty!B19": "freqsev(negative_binomial("},
    )


# ------------------------------------------------------------------ (c) one-page rating sheet
def _rating_model():
    a = demo_data.per_risk_assumptions()
    return lw.FrequencySeverity(lw.make_frequency(*a["frequency"]), lw.make_severity(*a["severity"]))


def _rating_layer(share=None):
    t = demo_data.per_risk_assumptions()["layer"]
    return lw.Layer.occurrence(t["attachment"], t["limit"], reinstatements=t["reinstatements"],
                               share=t["share"] if share is None else share)


def _rating_build() -> tuple[Workbook, list[KeyCell]]:
    keys: list[KeyCell] = []
    a = demo_data.per_risk_assumptions()
    t = a["layer"]
    g = lw.make_distortion(*a["distortion"])
    wb = Workbook()
    ws = wb.active
    ws.title = "Rating"
    s = _Sheet(ws, {"A": 36, "B": 18, "C": 4, "D": 42, "E": 20})
    s.heading("Rating sheet: per-risk property excess",
              f"One layer of an invented commercial property account, priced from large-loss assumptions. Amounts in {CUR}.",
              "E")
    s.legend("A4", "B4")
    s.block_title(6, 1, 2, "Layer on offer")
    s.label("A7", f"Attachment per risk ({CUR})")
    s.input("B7", t["attachment"], AMOUNT)
    s.label("A8", f"Limit per risk ({CUR})")
    s.input("B8", t["limit"], AMOUNT)
    s.label("A9", "Our share")
    s.input("B9", t["share"], RATIO)
    s.label("A10", "Reinstatements")
    s.input("B10", t["reinstatements"], "0")
    s.label("A11", "Basis")
    s.input("B11", "occurrence")
    s.choices("B11", "occurrence,aggregate")

    s.block_title(13, 1, 2, "Loss assumptions")
    s.label("A14", "Large losses a year: family")
    s.input("B14", a["frequency"][0])
    s.choices("B14", "poisson,negative_binomial,binomial,fixed")
    s.label("A15", "Large losses a year: mean")
    s.input("B15", a["frequency"][1], "0.00")
    s.label("A16", "Large losses a year: cv (neg. binomial)")
    s.input("B16", None)
    s.label("A17", "Loss size: family")
    s.input("B17", a["severity"][0])
    s.choices("B17", "lognormal,gamma,pareto,single_pareto,weibull,exponential,generalized_pareto")
    s.label("A18", "Loss size: first parameter")
    s.input("B18", a["severity"][1], "0.00")
    s.label("A19", "Loss size: second parameter")
    s.input("B19", a["severity"][2], AMOUNT)
    s.note("A20", "single_pareto: Pareto shape, then the threshold above which losses are counted; "
                  "lognormal and gamma: mean, then cv.", merge_to="B20", height=26)

    s.block_title(22, 1, 2, "Pricing basis")
    s.label("A23", "Distortion family")
    s.input("B23", a["distortion"][0])
    s.choices("B23", FAMILY_NAMES)
    s.label("A24", "Distortion parameter")
    s.input("B24", a["distortion"][1], PARAM)

    s.block_title(6, 4, 5, "Technical price (our share)")
    rows = [
        ("Expected loss", "LW_EXPECTED_LOSS", "expected_loss", AMOUNT),
        ("Technical premium", "LW_PREMIUM", "premium", AMOUNT),
        ("Risk margin", "LW_MARGIN", "margin", AMOUNT),
        ("Loss ratio", "LW_LOSS_RATIO", "loss_ratio", RATIO),
        ("Rate on line", "LW_RATE_ON_LINE", "rate_on_line", RATIO),
        ("Capital (fully collateralised)", "LW_CAPITAL", "capital", AMOUNT),
        ("Return on capital", "LW_RETURN_ON_CAPITAL", "return_on_capital", RATIO),
    ]
    refs = dict(model="$B$30", a="$B$7", l="$B$8", dist="$B$29", share="$B$9", basis="$B$11", rein="$B$10")
    lay = _rating_layer()
    for i, (label, fn, q, fmt) in enumerate(rows):
        r = 7 + i
        s.label(f"D{r}", label + (f" ({CUR})" if fmt == AMOUNT else ""))
        s.formula(f"E{r}", _layer_formula(fn, **refs), fmt, bold=True)
        keys.append(KeyCell(f"Rating!E{r}", q, lay, None if fn == "LW_EXPECTED_LOSS" else g))
    ws["E8"].font = Font(bold=True, size=13)
    s.label("D15", "Probability the layer is hit in a year")
    s.formula("E15", '=LW_LAYER_STAT($B$30, $B$7, $B$8, "prob_attach", "", $B$9, $B$11, $B$10)', PROB)
    keys.append(KeyCell("Rating!E15", "prob_attach", lay))
    s.label("D16", "Probability it is used up in a year")
    s.formula("E16", '=LW_LAYER_STAT($B$30, $B$7, $B$8, "prob_exhaust", "", $B$9, $B$11, $B$10)', PROB)
    keys.append(KeyCell("Rating!E16", "prob_exhaust", lay))
    s.label("D17", f"Expected loss, 100% of the layer ({CUR})")
    s.formula("E17", '=LW_EXPECTED_LOSS($B$30, $B$7, $B$8, 1, $B$11, $B$10)', AMOUNT)
    keys.append(KeyCell("Rating!E17", "expected_loss", _rating_layer(share=1.0)))
    s.label("D18", f"Technical premium, 100% of the layer ({CUR})")
    s.formula("E18", '=LW_PREMIUM($B$30, $B$7, $B$8, $B$29, 1, $B$11, $B$10)', AMOUNT)
    keys.append(KeyCell("Rating!E18", "premium", _rating_layer(share=1.0), g))

    s.note("D20", "Premium excludes brokerage, expenses and taxes. Capital: the layer's largest annual payment "
                  "(limit x (1 + reinstatements) x share) less premium. Change the shaded inputs on the left; "
                  "everything here follows.", merge_to="E23")

    s.block_title(26, 1, 5, "Working cells: references the price cells use")
    for r, (label, text) in enumerate([
        ("Frequency", "=LW_FREQUENCY(B14, B15, B16)"),
        ("Severity", '=LW_SEVERITY(B17, B18, B19, "", "")'),
        ("Distortion", "=LW_DISTORTION(B23, B24)"),
        ("Model", "=LW_MODEL_FREQSEV(B27, B28)"),
    ], start=27):
        s.label(f"A{r}", label)
        s.formula(f"B{r}", text)
        ws[f"B{r}"].font = Font(color="666666", size=9)
        ws.merge_cells(f"B{r}:E{r}")
    ws.freeze_panes = "A5"
    _page(ws, landscape=False, area="A1:E30")
    return wb, keys


def _rating_example() -> Example:
    return Example(
        name="rating_sheet", filename="rating_sheet.xlsx", title="Rating sheet: per-risk property excess",
        description="one-page underwriter's sheet: inputs on the left, technical price on the right",
        make=_rating_build, model=_rating_model, table="Rating!D6:E18",
        text_cells={"Rating!B30": "freqsev(poisson("},
    )


# ------------------------------------------------------------------ (d) distortion families compared
HAIL_TOWER = [(20e6, 10e6), (30e6, 15e6), (45e6, 25e6), (70e6, 50e6)]  # aggregate (stop-loss) layers
HAIL_TOWER_LOAD = 1.6  # every family charges this multiple of expected loss for the whole tower
FAMILY_BLOCKS = [
    ("wang", "Wang transform"), ("proportional_hazard", "Proportional hazard"), ("dual_power", "Dual power"),
    ("tvar", "Tail value at risk"), ("cost_of_capital", "Constant cost of capital"),
]
_BLOCK_COLUMNS = [("Premium", "LW_PREMIUM", AMOUNT), ("Loss ratio", "LW_LOSS_RATIO", RATIO),
                  ("Rate on line", "LW_RATE_ON_LINE", RATIO), ("Return on capital", "LW_RETURN_ON_CAPITAL", RATIO)]


def _hail_table():
    return demo_data.hail_year_loss_table()


def _hail_model():
    return lw.YearLossTable(_hail_table()["loss"].to_numpy(float))


def _hail_layers():
    return [lw.Layer.aggregate(a, l) for a, l in HAIL_TOWER]


def hail_family_parameters(model=None) -> dict[str, float]:
    """Each family's parameter (rounded) at which the whole hail tower costs HAIL_TOWER_LOAD x its expected loss."""
    m = _hail_model() if model is None else model
    lo = HAIL_TOWER[0][0]
    hi = HAIL_TOWER[-1][0] + HAIL_TOWER[-1][1]
    span = lw.Layer.aggregate(lo, hi - lo)
    el = float(lw.price_layers(m, [span], TVaRDistortion(0.0)).iloc[0]["expected_loss"])
    out = {}
    for fam, _ in FAMILY_BLOCKS:
        res = lw.implied_parameter(m, span, fam, premium=HAIL_TOWER_LOAD * el)
        out[fam] = float(round(res.value, 4))
    return out


def _compare_build() -> tuple[Workbook, list[KeyCell]]:
    keys: list[KeyCell] = []
    table = _hail_table()
    n = len(table)
    params = hail_family_parameters()
    wb = Workbook()
    ws = wb.active
    ws.title = "Compare"
    widths = {"A": 22, "B": 15, "C": 15, "D": 15}
    starts = []
    col = 6
    for _ in FAMILY_BLOCKS:
        starts.append(col)
        for j in range(len(_BLOCK_COLUMNS)):
            widths[get_column_letter(col + j)] = 13 if j == 0 else 10.5
        widths[get_column_letter(col + len(_BLOCK_COLUMNS))] = 2.5
        col += len(_BLOCK_COLUMNS) + 1
    widths["E"] = 2.5
    last = get_column_letter(starts[-1] + len(_BLOCK_COLUMNS) - 1)
    s = _Sheet(ws, widths)
    s.heading("The same tower under five distortion families",
              f"Aggregate (stop-loss) layers on the simulated annual totals of an invented hail account ({n:,} years, "
              f"sheet YearLoss). Amounts in {CUR}.", last)
    s.legend("A4", "B4")
    s.label("A6", "Model (reference)")
    s.formula("B6", f"=LW_MODEL_YEARLOSS(YearLoss!B{_DATA_HEADER + 1}:B{_DATA_HEADER + n})")
    s.label("A7", "Layer basis")
    s.input("B7", "aggregate")
    s.note("C7", "a year loss table holds annual totals only, so layers apply to the annual total")
    s.note("A8", f"Each family's parameter was chosen (when this workbook was built) so that the whole tower costs "
                 f"{HAIL_TOWER_LOAD:g} times its expected loss; the families then share that premium out between "
                 "the layers differently. Change a parameter to see its effect.")

    first = 14  # header row of the table
    k = len(HAIL_TOWER)
    layers = _hail_layers()
    s.header_row(first, 1, ["Layer", f"Attachment ({CUR})", f"Limit ({CUR})", f"Expected loss ({CUR})"])
    for i, lay in enumerate(layers):
        r = first + 1 + i
        s.label(f"A{r}", f"Layer {i + 1}", bold=True)
        s.input(f"B{r}", lay.attachment, AMOUNT)
        s.input(f"C{r}", lay.limit, AMOUNT)
        s.formula(f"D{r}", f'=LW_EXPECTED_LOSS($B$6, B{r}, C{r}, 1, $B$7, "")', AMOUNT)
        keys.append(KeyCell(f"Compare!D{r}", "expected_loss", lay))
    rt = first + 1 + k
    s.label(f"A{rt}", "Tower", bold=True)
    s.formula(f"D{rt}", f"=SUM(D{first + 1}:D{rt - 1})", AMOUNT)
    s.total_style(rt, 1, 4)
    for (fam, title), c0 in zip(FAMILY_BLOCKS, starts):
        c = get_column_letter
        s.block_title(10, c0, c0 + len(_BLOCK_COLUMNS) - 1, title)
        ws.cell(11, c0, "family")
        s.input(f"{c(c0 + 1)}11", fam)
        ws.cell(12, c0, "parameter")
        s.input(f"{c(c0 + 1)}12", params[fam], PARAM)
        ws.cell(13, c0, "distortion")
        s.formula(f"{c(c0 + 1)}13", f"=LW_DISTORTION({c(c0 + 1)}11, {c(c0 + 1)}12)")
        ws[f"{c(c0 + 1)}13"].font = Font(color="666666", size=9)
        for r in (11, 12, 13):
            ws.cell(r, c0).font = _NOTE_FONT
        g = lw.make_distortion(fam, params[fam])
        dref = f"${c(c0 + 1)}$13"
        s.header_row(first, c0, [h + (f" ({CUR})" if fmt == AMOUNT else "") for h, _, fmt in _BLOCK_COLUMNS])
        for i, lay in enumerate(layers):
            r = first + 1 + i
            for j, (_, fn, fmt) in enumerate(_BLOCK_COLUMNS):
                cell = f"{c(c0 + j)}{r}"
                s.formula(cell, f'={fn}($B$6, $B{r}, $C{r}, {dref}, 1, $B$7, "")', fmt, bold=j == 0)
                keys.append(KeyCell(f"Compare!{cell}", _QUANTITY[fn], lay, g))
        pc, lc = c(c0), c(c0 + 1)
        s.formula(f"{pc}{rt}", f"=SUM({pc}{first + 1}:{pc}{rt - 1})", AMOUNT)
        s.formula(f"{lc}{rt}", f"=$D{rt}/{pc}{rt}", RATIO)
        s.total_style(rt, c0, c0 + len(_BLOCK_COLUMNS) - 1)
    s.note(f"A{rt + 2}", "Reading the table: the loss ratio going up each block shows how the family shares the "
                         "same total out between the layers; the further it falls towards the top layers, the more "
                         "the family loads the tail.")
    # a compact view: each family's loss ratio per layer, read from the blocks above
    v0 = rt + 4
    s.label(f"A{v0}", "At a glance: loss ratio by layer and family (from the blocks above)", bold=True)
    s.header_row(v0 + 1, 1, ["Layer"])
    for c0 in starts:  # under each family's block
        cell = ws.cell(v0 + 1, c0, f"={get_column_letter(c0 + 1)}11")
        cell.fill, cell.font = _HEAD_FILL, _HEAD_FONT
        cell.alignment = Alignment(horizontal="center", vertical="center", wrap_text=True)
    for i in range(k + 1):
        r = v0 + 2 + i
        src = first + 1 + i
        s.formula(f"A{r}", f"=A{src}", bold=True)
        for c0 in starts:
            s.formula(f"{get_column_letter(c0)}{r}", f"={get_column_letter(c0 + 1)}{src}", RATIO)
    s.total_style(v0 + 2 + k, 1, 1)
    for c0 in starts:
        s.total_style(v0 + 2 + k, c0, c0)
    ws.freeze_panes = "E5"
    _page(ws, area=f"A1:{last}{v0 + 2 + k}")
    ws.page_setup.paperSize = ws.PAPERSIZE_A3

    d = wb.create_sheet("YearLoss")
    ds = _Sheet(d, {"A": 10, "B": 20})
    ds.note("A1", f"Invented hail seasons: the total loss of each of {n:,} simulated years, in {CUR}.")
    ds.header_row(_DATA_HEADER, 1, ["year", f"annual loss ({CUR})"])
    for i, (y, x) in enumerate(zip(table["year"].tolist(), table["loss"].tolist()), start=_DATA_HEADER + 1):
        d.cell(i, 1, int(y))
        d.cell(i, 2, float(x)).number_format = AMOUNT
    d.freeze_panes = f"A{_DATA_HEADER + 1}"
    return wb, keys


def _compare_example() -> Example:
    return Example(
        name="distortion_comparison", filename="distortion_comparison.xlsx",
        title="The same tower under five distortion families",
        description="one column block per distortion family, each charging the same total for the tower",
        make=_compare_build, model=_hail_model, table="Compare!A24:Z29",
        text_cells={"Compare!B6": "yearloss#"},
    )


# ------------------------------------------------------------------ (e) capital, target return and allocation
CAPITAL_STANDARD = ("tvar", 0.99)
CAPITAL_TARGET = 0.12
CAPITAL_TOWER = [(35e6, 15e6), (50e6, 25e6), (75e6, 40e6)]  # aggregate layers on the portfolio's annual total
CAPITAL_BREAKS = (30e6, 60e6, 90e6)  # interior boundaries of the capital slices
CAPITAL_ALLOCATE_WITH = "wang"
_UNIT_COLS = ["windstorm", "hail", "casualty"]


def _units_table():
    return demo_data.portfolio_units_table()


def _capital_model():
    return lw.YearLossTable(_units_table()[_UNIT_COLS].sum(axis=1).to_numpy(float))


def _calibrated(model, family):
    std = lw.make_capital_standard(*CAPITAL_STANDARD)
    return lw.make_distortion(family, lw.calibrate_to_return(model, CAPITAL_TARGET, std, family).value)


def _capital_build() -> tuple[Workbook, list[KeyCell]]:
    keys: list[KeyCell] = []
    units = _units_table()
    n = len(units)
    std = lw.make_capital_standard(*CAPITAL_STANDARD)
    wb = Workbook()
    ws = wb.active
    ws.title = "Capital"
    s = _Sheet(ws, {"A": 40, "B": 16, "C": 24, "D": 15, "E": 15, "F": 15, "G": 15, "H": 15, "I": 15})
    s.heading("Capital, target return and allocation",
              f"An invented portfolio of three units (windstorm, hail, casualty; {n:,} simulated years, sheet Units). "
              f"Its assets follow a capital standard; each distortion family is calibrated so the portfolio earns the "
              f"target return on its capital. Amounts in {CUR}.", "I")
    s.legend("A4", "B4")

    s.label("A6", "Capital standard and target", bold=True)
    s.label("A7", "Capital standard")
    s.input("B7", CAPITAL_STANDARD[0])
    s.choices("B7", "var,tvar,amount")
    s.note("C7", "var: VaR at the level; tvar: TVaR at the level; amount: the level is the assets themselves")
    s.label("A8", "Level")
    s.input("B8", CAPITAL_STANDARD[1], "0.000")
    s.label("A9", "Target return on capital")
    s.input("B9", CAPITAL_TARGET, RATIO)
    lo, hi = _DATA_HEADER + 1, _DATA_HEADER + n
    s.label("A10", "Portfolio model (reference)")
    s.formula("B10", f"=LW_MODEL_YEARLOSS(Units!D{lo}:D{hi})")
    model = "$B$10"
    sl = "$B$7, $B$8"
    s.label("A11", f"Assets ({CUR})")
    s.formula("B11", f'=LW_PORTFOLIO({model}, $C$17, {sl}, "assets")', AMOUNT, bold=True)
    s.label("A12", f"Expected loss paid, E[min(X, assets)] ({CUR})")
    s.formula("B12", f'=LW_PORTFOLIO({model}, $C$17, {sl}, "expected_loss")', AMOUNT)
    s.label("A13", f"Expected default, E[(X - assets)+] ({CUR})")
    s.formula("B13", f'=LW_PORTFOLIO({model}, $C$17, {sl}, "expected_default")', AMOUNT)

    def portfolio(q, fam):
        return lambda m: getattr(lw.price_portfolio(m, _calibrated(m, fam), std), q)

    keys.append(KeyCell("Capital!B11", "assets", engine=portfolio("assets", FAMILY_BLOCKS[0][0])))
    keys.append(KeyCell("Capital!B12", "expected_loss", engine=portfolio("expected_loss", FAMILY_BLOCKS[0][0])))
    keys.append(KeyCell("Capital!B13", "expected_default", engine=portfolio("expected_default", FAMILY_BLOCKS[0][0])))

    # ---- calibration, one row per family
    s.label("A15", "Calibrated to the target: one row per distortion family", bold=True)
    s.header_row(16, 1, ["Family", "Parameter", "Distortion (reference)", f"Premium ({CUR})", f"Margin ({CUR})",
                         f"Capital ({CUR})", "Return on capital", "Loss ratio"])
    fam_rows = {}
    for i, (fam, _) in enumerate(FAMILY_BLOCKS):
        r = 17 + i
        fam_rows[fam] = r
        s.input(f"A{r}", fam)
        s.choices(f"A{r}", FAMILY_NAMES)
        s.formula(f"B{r}", f"=LW_CALIBRATE({model}, $B$9, {sl}, A{r})", PARAM, bold=True)
        keys.append(KeyCell(f"Capital!B{r}", "parameter",
                            engine=lambda m, f=fam: lw.calibrate_to_return(m, CAPITAL_TARGET, std, f).value))
        s.formula(f"C{r}", f"=LW_DISTORTION(A{r}, B{r})")
        ws[f"C{r}"].font = Font(color="666666", size=9)
        for col, q, fmt in (("D", "premium", AMOUNT), ("E", "margin", AMOUNT), ("F", "capital", AMOUNT),
                            ("G", "return_on_capital", RATIO), ("H", "loss_ratio", RATIO)):
            s.formula(f"{col}{r}", f'=LW_PORTFOLIO({model}, C{r}, {sl}, "{q}")', fmt, bold=q == "premium")
            keys.append(KeyCell(f"Capital!{col}{r}", q, engine=portfolio(q, fam)))
    s.note("A22", "Every family earns the target return on the portfolio's capital; they differ in how they "
                  "price its parts, as the tower below shows.")

    # ---- a tower priced with each calibrated family
    s.label("A24", "A tower on the portfolio's annual total, priced with each calibrated family", bold=True)
    heads = ["Layer", f"Attachment ({CUR})", f"Limit ({CUR})", f"Expected loss ({CUR})"]
    s.header_row(25, 1, heads)
    for j, (fam, _) in enumerate(FAMILY_BLOCKS):
        c = ws.cell(25, 5 + j, f'="Premium, "&A{fam_rows[fam]}')
        c.fill, c.font = _HEAD_FILL, _HEAD_FONT
        c.alignment = Alignment(horizontal="center", vertical="center", wrap_text=True)
    t0 = 26
    for i, (a, lim) in enumerate(CAPITAL_TOWER):
        r = t0 + i
        lay = lw.Layer.aggregate(a, lim)
        s.label(f"A{r}", f"Layer {i + 1}", bold=True)
        s.input(f"B{r}", a, AMOUNT)
        s.input(f"C{r}", lim, AMOUNT)
        s.formula(f"D{r}", f'=LW_EXPECTED_LOSS({model}, B{r}, C{r}, 1, "aggregate", "")', AMOUNT)
        keys.append(KeyCell(f"Capital!D{r}", "expected_loss", lay))
        for j, (fam, _) in enumerate(FAMILY_BLOCKS):
            col = get_column_letter(5 + j)
            s.formula(f"{col}{r}", f'=LW_PREMIUM({model}, $B{r}, $C{r}, $C${fam_rows[fam]}, 1, "aggregate", "")', AMOUNT)
            keys.append(KeyCell(f"Capital!{col}{r}", "premium", lay, engine=lambda m, f=fam, x=lay: float(
                lw.price_layers(m, [x], _calibrated(m, f)).iloc[0]["premium"])))
    tt = t0 + len(CAPITAL_TOWER)
    s.label(f"A{tt}", "Tower", bold=True)
    for j in range(4, 10):
        col = get_column_letter(j)
        s.formula(f"{col}{tt}", f"=SUM({col}{t0}:{col}{tt - 1})", AMOUNT)
    s.total_style(tt, 1, 9)

    # ---- allocation to capital slices
    a0 = tt + 2
    s.label(f"A{a0}", "Allocation to capital slices (layers of the capital structure)", bold=True)
    s.label(f"A{a0 + 1}", "Allocate with family")
    s.input(f"B{a0 + 1}", CAPITAL_ALLOCATE_WITH)
    s.choices(f"B{a0 + 1}", FAMILY_NAMES)
    s.label(f"A{a0 + 2}", "Its calibrated parameter")
    s.formula(f"B{a0 + 2}", f"=LW_CALIBRATE({model}, $B$9, {sl}, B{a0 + 1})", PARAM)
    s.label(f"A{a0 + 3}", "Distortion (reference)")
    s.formula(f"B{a0 + 3}", f"=LW_DISTORTION(B{a0 + 1}, B{a0 + 2})")
    dist = f"$B${a0 + 3}"
    s.label(f"A{a0 + 4}", f"Slice boundaries ({CUR})")
    for j, b in enumerate(CAPITAL_BREAKS):
        s.input(f"{get_column_letter(2 + j)}{a0 + 4}", b, AMOUNT)
    s.note(f"{get_column_letter(2 + len(CAPITAL_BREAKS))}{a0 + 4}", "increasing, below the assets")
    h = a0 + 6
    s.header_row(h, 1, ["Slice", f"From ({CUR})", f"To ({CUR})", f"Width ({CUR})", f"Expected loss ({CUR})",
                        f"Premium ({CUR})", f"Margin ({CUR})", f"Capital ({CUR})", "Return on capital"])
    g_alloc = lambda m: _calibrated(m, CAPITAL_ALLOCATE_WITH)  # noqa: E731
    assets = std.assets(_capital_model().annual())
    edges = [0.0, *CAPITAL_BREAKS, assets]
    k = len(CAPITAL_BREAKS) + 1
    for i in range(k):
        r = h + 1 + i
        s.label(f"A{r}", f"Slice {i + 1}", bold=True)
        if i == 0:
            ws[f"B{r}"] = 0
        else:
            s.formula(f"B{r}", f"=C{r - 1}")
        ws[f"B{r}"].number_format = AMOUNT
        top = f"{get_column_letter(2 + i)}{a0 + 4}" if i < k - 1 else "$B$11"
        s.formula(f"C{r}", f"={top}", AMOUNT)
        s.formula(f"D{r}", f"=C{r}-B{r}", AMOUNT)
        lay = lw.Layer.aggregate(edges[i], edges[i + 1] - edges[i])
        for col, fn, fmt in (("E", "LW_EXPECTED_LOSS", AMOUNT), ("F", "LW_PREMIUM", AMOUNT), ("G", "LW_MARGIN", AMOUNT),
                             ("H", "LW_CAPITAL", AMOUNT), ("I", "LW_RETURN_ON_CAPITAL", RATIO)):
            s.formula(f"{col}{r}", _layer_formula(fn, model, f"B{r}", f"D{r}", dist, "1", '"aggregate"', '""'), fmt,
                      bold=fn == "LW_PREMIUM")
            q = _QUANTITY[fn]
            if fn == "LW_EXPECTED_LOSS":
                keys.append(KeyCell(f"Capital!{col}{r}", q, lay))
            else:
                keys.append(KeyCell(f"Capital!{col}{r}", q, lay, engine=lambda m, x=lay, q=q: float(
                    lw.price_layers(m, [x], g_alloc(m)).iloc[0][q])))
    rt = h + 1 + k
    s.label(f"A{rt}", "Slices together", bold=True)
    for col in "EFGH":
        s.formula(f"{col}{rt}", f"=SUM({col}{h + 1}:{col}{rt - 1})", AMOUNT)
    s.formula(f"I{rt}", f"=G{rt}/H{rt}", RATIO)
    s.total_style(rt, 1, 9)
    s.label(f"A{rt + 1}", "The portfolio (LW_PORTFOLIO)")
    for col, q, fmt in (("E", "expected_loss", AMOUNT), ("F", "premium", AMOUNT), ("G", "margin", AMOUNT),
                        ("H", "capital", AMOUNT), ("I", "return_on_capital", RATIO)):
        s.formula(f"{col}{rt + 1}", f'=LW_PORTFOLIO({model}, {dist}, {sl}, "{q}")', fmt)
        keys.append(KeyCell(f"Capital!{col}{rt + 1}", q, engine=portfolio(q, CAPITAL_ALLOCATE_WITH)))
    s.note(f"A{rt + 2}", "Each slice is fully collateralised by its width; the slices add up to the portfolio "
                         "(same premium, capital and return).")

    # ---- allocation to units: ordinary cells reading one spilled LW_ALLOCATE_UNITS table further down
    u0 = rt + 4
    nu = len(_UNIT_COLS)
    x0 = u0 + 5 + nu  # the spilled tables
    y_units = x0 + 2
    s.label(f"A{u0}", "Allocation to units (natural allocation, same distortion and standard)", bold=True)
    heads = ["Unit", f"Expected loss ({CUR})", f"Premium ({CUR})", f"Margin ({CUR})", "Loss ratio",
             f"Assets ({CUR})", f"Capital ({CUR})", "Return on capital"]
    s.header_row(u0 + 1, 1, heads)
    cols = [("A", None, None), ("B", "expected_loss", AMOUNT), ("C", "premium", AMOUNT), ("D", "margin", AMOUNT),
            ("E", "loss_ratio", RATIO), ("F", "assets", AMOUNT), ("G", "capital", AMOUNT),
            ("H", "return_on_capital", RATIO)]

    def unit_value(row_index, q):
        def f(_model):
            frame = lw.allocate_to_units(units[_UNIT_COLS], _calibrated(_capital_model(), CAPITAL_ALLOCATE_WITH), std)
            return frame.iloc[row_index][q]
        return f

    for i in range(nu + 1):
        r = u0 + 2 + i
        for col, q, fmt in cols:
            s.formula(f"{col}{r}", f"={col}{y_units + 1 + i}", fmt, bold=col == "A" or q == "premium")
            if q is not None:
                keys.append(KeyCell(f"Capital!{col}{r}", q, engine=unit_value(i, q)))
    s.total_style(u0 + 2 + nu, 1, 8)
    s.note(f"A{u0 + 3 + nu}", "Each unit's part of the premium and of the assets, by its expected loss in the years "
                              "that strain the portfolio; the units add up to the total row. A unit's capital is negative "
                              "when its premium exceeds the assets it is allotted. (These cells read the "
                              "LW_ALLOCATE_UNITS table below.)")

    # ---- table functions (array formulas)
    s.label(f"A{x0}", "Table functions (spilled tables)", bold=True)
    s.note(f"A{x0 + 1}", "Array formulas: Excel with the add-in and layerwise's priced copies show them; programs "
                         "without layerwise recalculate array formulas and may show #NAME? here.")
    unit_range = f"Units!$A${_DATA_HEADER}:$C${hi}"
    ws[f"A{y_units}"] = ArrayFormula(
        f"A{y_units}:I{y_units + nu + 1}", f"=LW_ALLOCATE_UNITS({unit_range}, {dist}, {sl})")
    z0 = y_units + nu + 3
    breaks = f"B{a0 + 4}:{get_column_letter(1 + len(CAPITAL_BREAKS))}{a0 + 4}"
    ws[f"A{z0}"] = ArrayFormula(
        f"A{z0}:D{z0 + k + 1}",
        f'=LW_ALLOCATE_LAYERS({model}, {dist}, {sl}, {breaks}, "layer,premium,capital,return_on_capital")')
    y0 = z0 + k + 3
    rows = 1 + len(FAMILY_BLOCKS) * len(CAPITAL_TOWER)
    ws[f"A{y0}"] = ArrayFormula(
        f"A{y0}:E{y0 + rows - 1}",
        f'=LW_TARGET_TOWER({model}, B{t0}:B{tt - 1}, C{t0}:C{tt - 1}, $B$9, {sl}, "", 1, "aggregate", "", "", '
        '"distortion,value,layer,premium,return_on_capital")')
    for r0, r1, fmts in ((y_units + 1, y_units + nu + 1, [None, AMOUNT, AMOUNT, AMOUNT, RATIO, AMOUNT, AMOUNT, RATIO, "0.00"]),
                         (z0 + 1, z0 + k + 1, [None, AMOUNT, AMOUNT, RATIO]),
                         (y0 + 1, y0 + rows - 1, [None, PARAM, None, AMOUNT, RATIO])):
        for r in range(r0, r1 + 1):
            for j, fmt in enumerate(fmts, start=1):
                if fmt:
                    ws.cell(r, j).number_format = fmt
    ws.freeze_panes = "A5"
    _page(ws, area=f"A1:I{y0 + rows}")

    d = wb.create_sheet("Units")
    ds = _Sheet(d, {"A": 16, "B": 16, "C": 16, "D": 16})
    ds.note("A1", f"Invented annual losses of three units, one row per simulated year ({n:,} years), in {CUR}; "
                  "total = their sum, written when the workbook was built (update it if you change a unit).")
    ds.header_row(_DATA_HEADER, 1, [*_UNIT_COLS, "total"])
    total = units[_UNIT_COLS].sum(axis=1)
    for i, row in enumerate(zip(*(units[c].tolist() for c in _UNIT_COLS), total.tolist()), start=_DATA_HEADER + 1):
        for j, v in enumerate(row, start=1):
            d.cell(i, j, float(v)).number_format = AMOUNT
    d.freeze_panes = f"A{_DATA_HEADER + 1}"
    return wb, keys


def _capital_example() -> Example:
    return Example(
        name="capital", filename="capital.xlsx", title="Capital, target return and allocation",
        description="capital standard, target return, calibrated families, tower prices, allocation by layer and unit",
        make=_capital_build, model=_capital_model, table="Capital!A16:H21",
        table_columns=("Family", "Parameter", "Premium", "Margin", "Capital", "Return on capital", "Loss ratio"),
        text_cells={"Capital!B10": "yearloss#", "Capital!C17": "wang("},
    )


# ------------------------------------------------------------------ registry
#: name -> Example, in the order they are built.
EXAMPLES: dict[str, Example] = {
    ex.name: ex for ex in (_cat_example(), _casualty_example(), _rating_example(), _compare_example(),
                          _capital_example())
}


def example_for(path) -> Example | None:
    """The example whose file name matches ``path`` (also its priced copy ``<stem>.priced.xlsx``), or None."""
    name = Path(path).name
    for ex in EXAMPLES.values():
        stem = Path(ex.filename).stem
        if name == ex.filename or (name.startswith(stem + ".") and name.endswith(".xlsx")):
            return ex
    return None


def build_examples(folder, names=None) -> list[Path]:
    """Write the example workbooks (all, or those named) into ``folder``; returns their paths."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    chosen = list(EXAMPLES) if names is None else list(names)
    out = []
    for name in chosen:
        if name not in EXAMPLES:
            raise KeyError(f"no example named {name!r}; examples are {', '.join(EXAMPLES)}")
        ex = EXAMPLES[name]
        path = folder / ex.filename
        ex.build().save(path)
        out.append(path)
    return out


# ------------------------------------------------------------------ comparing workbooks by content
def workbook_contents(path) -> dict:
    """What a workbook says, independent of the bytes of the file: per sheet, each cell's formula or value,
    number format, merged ranges and array formula ranges; plus the sheet order."""
    wb = load_workbook(path)
    out = {"sheets": wb.sheetnames}
    for ws in wb.worksheets:
        cells = {}
        for row in ws.iter_rows():
            for c in row:
                v = c.value
                if v is None:
                    continue
                if isinstance(v, ArrayFormula):
                    v = ("array", v.ref, v.text)
                elif isinstance(v, float) and v.is_integer():
                    v = int(v)
                cells[c.coordinate] = (v, c.number_format)
        out[ws.title] = {"cells": cells, "merged": sorted(str(r) for r in ws.merged_cells.ranges)}
    return out


def compare_contents(a, b, limit: int = 20) -> list[str]:
    """Differences between two workbooks' contents (empty when they say the same)."""
    ca, cb = workbook_contents(a), workbook_contents(b)
    diffs = []
    if ca["sheets"] != cb["sheets"]:
        return [f"sheets differ: {ca['sheets']} vs {cb['sheets']}"]
    for sheet in ca["sheets"]:
        x, y = ca[sheet], cb[sheet]
        if x["merged"] != y["merged"]:
            diffs.append(f"{sheet}: merged ranges differ")
        for coord in sorted(set(x["cells"]) | set(y["cells"])):
            u, v = x["cells"].get(coord), y["cells"].get(coord)
            if u != v:
                diffs.append(f"{sheet}!{coord}: {u!r} vs {v!r}")
                if len(diffs) >= limit:
                    return diffs
    return diffs


