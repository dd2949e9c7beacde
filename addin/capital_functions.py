"""Worksheet functions for the portfolio: capital, calibration, allocation, sensitivities, reinstatements, loads.

The same bridge rules as :mod:`layerwise.addin.functions` apply: arguments are
cell-shaped, every function is wrapped by
:func:`~layerwise.addin.functions.cell_function` (bad input comes back as a
text error value naming the argument, e.g.
``#VALUE! LW_PORTFOLIO(level): must lie in (0, 1), got 1.5``), tables are a
header row and one row per record, spilled from the calling cell. The
functions are registered in the same :data:`~layerwise.addin.functions.FUNCTIONS`
dict and listed by :func:`~layerwise.addin.functions.describe_functions`.

Capital standard. The portfolio (the model's ground-up annual total X) holds
assets a set by ``standard`` and ``level``: "var" (a = VaR at the probability
``level``, 0 < level < 1), "tvar" (a = TVaR at ``level``, 0 <= level < 1) or
"amount" (``level`` is the assets themselves, in currency units). It pays
X ∧ a; capital is a - premium and return on capital margin / capital.

Families. Calibration and implied parameters search one-parameter distortion
families: proportional_hazard (ph), wang, dual_power, tvar, cost_of_capital
(ccoc). ``families`` takes one or several names (a range, or a
comma-separated text); empty = all five.

Grid tolerances. As for the layer functions, a single-cell result that rests
on a grid the engine flags (see price_layers' ``warning`` column) is a
``#NUM!`` error value under ``model``; two-column tables then end with a
``warning`` row, and LW_CALIBRATION puts the warning in its ``note`` column.

Towers. Functions pricing several layers take ``attachments`` and ``limits``
and the optional ``shares``, ``basis``, ``reinstatements`` and
``agg_deductibles`` exactly as LW_TOWER does.
"""
from __future__ import annotations

import math
from contextlib import ExitStack, contextmanager

import numpy as np

from layerwise.engine.allocation import allocate_to_layers, allocate_to_units
from layerwise.engine.calibration import (
    _family, calibrate, calibrate_to_return, implied_parameter, implied_spread, price_at_target,
)
from layerwise.engine.capital import CapitalStandard, capital_layers, price_portfolio
from layerwise.engine.distortions import make_distortion
from layerwise.engine.errors import InputError
from layerwise.engine.loads import gross_premium
from layerwise.engine.layers import Layer
from layerwise.engine.models import FrequencySeverity, YearEventTable, YearLossTable
from layerwise.engine.pricing import price_layers
from layerwise.engine.reinstatements import price_with_reinstatements
from layerwise.engine.sensitivity import price_sensitivities

from . import cells, functions, handles
from .cells import CellInputError
from .functions import (
    CATEGORY, HELP, _args, _columns, _layer, _per_layer, _terms, _texts, _within_tolerance, cell_function, xl_arg, xl_func,
    xl_ret,
)

__all__ = ["FUNCTIONS", "TABLES"]

# One-line argument help texts shared by the functions below (at most 255 characters each).
CAPITAL_HELP = {
    "standard": "How the portfolio's assets are set: 'var' (VaR at level), 'tvar' (TVaR at level) or 'amount' (level is the assets).",
    "level": "Probability level for var, in (0, 1), or tvar, in [0, 1), e.g. 0.99; for amount, the assets in currency units, > 0.",
    "target_return": "Target return on capital: margin / (assets - premium), e.g. 0.12 for 12%.",
    "family": "Distortion family: proportional_hazard (ph), wang, dual_power, tvar or cost_of_capital (ccoc).",
    "families": "Distortion families, e.g. 'ph, wang' or a range of names: proportional_hazard, wang, dual_power, tvar, cost_of_capital; empty = all five.",
    "columns": "Columns to show, e.g. 'premium, capital' or a range of names; empty = all.",
    "price": "Observed market price of the layer: its premium in currency units (after share), or its rate on line when quote is 'rate_on_line'.",
    "quote": "How price is given: 'premium' (the default) or 'rate_on_line' (premium / (share x limit)).",
}
_TOWER_TAIL = ("shares", "basis", "reinstatements", "agg_deductibles")
TOWER_HELP = {  # a tower's terms, read as LW_TOWER reads them
    "attachments": "Attachment of each layer (a range), or a single number to stack the limits contiguously from it.",
    "limits": "Limit of each layer, > 0 or 'unlimited': a one-row or one-column range.",
    "shares": "Share of each layer in (0, 1]: a range, or one value for all; empty = 1.",
    "reinstatements": "Reinstatements of each per-occurrence layer: a range (empty cell = unlimited), or one value for all.",
    "agg_deductibles": "Annual aggregate deductible of each per-occurrence layer: a range, or one value for all; empty = none.",
}

_STANDARDS = {
    "var": "var", "value_at_risk": "var", "quantile": "var",
    "tvar": "tvar", "tail_value_at_risk": "tvar", "expected_shortfall": "tvar", "es": "tvar",
    "amount": "amount", "assets": "amount", "fixed": "amount",
}
_QUOTES = {
    "premium": "premium", "prem": "premium",
    "rate_on_line": "rate_on_line", "rol": "rate_on_line", "rate": "rate_on_line",
}
_MEASURES = {
    "premium": "premium", "rate_on_line": "rate_on_line", "rol": "rate_on_line", "loss_ratio": "loss_ratio",
    "margin": "margin", "return_on_capital": "return_on_capital", "roc": "return_on_capital",
}
_PORTFOLIO_ROWS = ["standard", "distortion", "assets", "expected_loss", "premium", "margin", "capital",
                   "return_on_capital", "leverage", "loss_ratio", "expected_default", "grid_error"]
_PORTFOLIO_QUANTITIES = {
    **{k: k for k in _PORTFOLIO_ROWS[2:]},
    "el": "expected_loss", "mean": "expected_loss", "roc": "return_on_capital", "default": "expected_default",
}
_REINSTATEMENT_ROWS = {  # table label -> ReinstatementPrice field
    "upfront_premium": "upfront_premium",
    "expected_reinstatement_premium": "expected_reinstatement_premium",
    "total_expected_premium": "total_expected_premium",
    "expected_loss": "expected_loss",
    "loss_ratio": "loss_ratio",
    "upfront_loss_ratio": "upfront_loss_ratio",
    "rate_on_line": "rate_on_line",
    "premium_free_reinstatements": "premium_no_reinstatement_cost",
    "reinstatements": "reinstatements",
    "monotone": "monotone",
    "method": "method",
}
_REINSTATEMENT_QUANTITIES = {  # alias -> table label
    **{k: k for k in _REINSTATEMENT_ROWS if k not in ("reinstatements", "monotone", "method")},
    "upfront": "upfront_premium", "premium": "upfront_premium",
    "expected_reinstatement": "expected_reinstatement_premium", "reinstatement": "expected_reinstatement_premium",
    "total": "total_expected_premium", "total_premium": "total_expected_premium",
    "el": "expected_loss", "rol": "rate_on_line",
    "free": "premium_free_reinstatements", "premium_no_reinstatement_cost": "premium_free_reinstatements",
}


class _NumberError(CellInputError):
    """A result too large for a number: #NUM!, under the argument that made it."""

    code = "#NUM!"


def _help(*names, **docs):
    """``_args`` with help texts from this module's CAPITAL_HELP, then the bridge's HELP, then ``docs``."""
    merged = {n: docs.get(n, CAPITAL_HELP.get(n, HELP.get(n))) for n in names}
    return _args(*names, **merged)


# =========================================================================== helpers
@contextmanager
def _engine(**renames):
    """Report the engine's InputErrors under the cell argument: ``renames`` maps engine names to cell names."""
    try:
        yield
    except CellInputError:
        raise
    except InputError as exc:
        if exc.argument in renames:
            raise CellInputError(renames[exc.argument], exc.message) from None
        raise


def _standard(standard, level) -> CapitalStandard:
    kind = cells.choice(standard, "standard", _STANDARDS)
    x = cells.number(level, "level")
    try:
        return CapitalStandard(kind, x)
    except InputError as exc:
        detail = exc.message if exc.argument == "level" else f"{exc.argument}: {exc.message}"
        raise CellInputError("standard" if exc.argument == "kind" else "level", detail) from None


def _family_names(value, argument: str = "families"):
    """Family names from a range or comma-separated text (validated); None = the default five."""
    if cells.is_empty(value):
        return None
    names = []
    for t in _texts(value, argument):
        names.extend(x.strip() for x in t.split(",") if x.strip())
    if not names:
        raise CellInputError(argument, "is empty")
    if len(names) == 1 and cells._key(names[0]) == "all":
        return None
    out = []
    for n in names:
        cls = _family(n, argument)
        if cls.family in out:
            raise CellInputError(argument, f"{cls.family} is given twice")
        out.append(cls.family)
    return out


def _distortions(value, argument: str = "distortion"):
    """One distortion, or a dict text -> distortion for a range of several (as LW_TOWER reads them)."""
    texts = _texts(value, argument)
    gs = {}
    for t in texts:
        gs.setdefault(t, handles.parse_distortion(t, argument))
    return gs if len(gs) > 1 else next(iter(gs.values()))


def _grid_note(model, layer: Layer, g) -> str:
    """The engine's grid warning for ``layer`` priced at ``g`` ("" when within the tolerances)."""
    return str(price_layers(model, [layer], g).iloc[0].get("warning", "") or "")


def _vouch(model, layer: Layer, g):
    """A #NUM! error under model when the grid behind a single-cell result is outside its tolerances."""
    _within_tolerance(price_layers(model, [layer], g).iloc[0])


def _warnings(model, layers, g) -> list[str]:
    """The engine's grid warning of each layer at ``g`` (a dict of distortions: one block of layers per distortion)."""
    return [str(w or "") for w in price_layers(model, layers, g)["warning"]]


def _table(frame, columns):
    cols = _columns(columns, list(frame.columns))
    if "warning" in frame.columns and "warning" not in cols and frame["warning"].astype(bool).any():
        cols.append("warning")  # a row outside the grid tolerances always shows why (as in LW_TOWER)
    return cells.table_to_cells(frame, cols)


def _pairs(rows) -> list[list]:
    """A two-column property table: header row, then (name, cell value) rows."""
    return [["property", "value"]] + [[k, cells._table_value(v)] for k, v in rows]


# =========================================================================== the portfolio
@xl_func(category=CATEGORY, volatile=False)
@_help(
    "model", "distortion", "standard", "level", "quantity",
    quantity="One figure instead of the table: assets, expected_loss, premium, margin, capital, return_on_capital, leverage, loss_ratio, expected_default or grid_error; empty = the table.",
)
@xl_ret(expand="table")
@cell_function
def LW_PORTFOLIO(model, distortion, standard, level, quantity=None):
    """The whole portfolio at a capital standard: assets, expected loss, premium, margin, capital, return, leverage."""
    g = handles.distortion_from(distortion)
    std = _standard(standard, level)
    what = cells.choice(quantity, "quantity", _PORTFOLIO_QUANTITIES, default=None)
    with handles.model_in_use(model) as (_, m):
        res = price_portfolio(m, g, std)
        whole = Layer.aggregate(0.0, res.assets)  # the portfolio's payments X ∧ a
        if what is not None:
            _vouch(m, whole, g)
            return getattr(res, what)
        note = _grid_note(m, whole, g)
    row = res.as_series()
    return _pairs([(k, row[k]) for k in _PORTFOLIO_ROWS] + ([("warning", note)] if note else []))


# =========================================================================== calibration
@xl_func(category=CATEGORY, volatile=False)
@_help("model", "target_return", "standard", "level", "family")
@xl_ret()
@cell_function
def LW_CALIBRATE(model, target_return, standard, level, family):
    """Parameter of a distortion family making the portfolio earn the target return on capital."""
    t = cells.number(target_return, "target_return")
    std = _standard(standard, level)
    fam = cells.text(family, "family")
    with handles.model_in_use(model) as (_, m):
        res = calibrate_to_return(m, t, std, fam)
        _vouch(m, Layer.aggregate(0.0, res.assets), res.distortion)
        return res.value


@xl_func(category=CATEGORY, volatile=False)
@_help("model", "target_return", "standard", "level", "families", "columns")
@xl_ret(expand="table")
@cell_function
def LW_CALIBRATION(model, target_return, standard, level, families=None, columns=None):
    """One row per family: the parameter earning the target return, its distortion reference and the portfolio's figures."""
    t = cells.number(target_return, "target_return")
    std = _standard(standard, level)
    fams = _family_names(families)
    with handles.model_in_use(model) as (_, m):
        std.assets(m.annual())  # an unusable standard is an error of level, not a note on every family
        frame = calibrate(m, t, std, fams, errors="skip")
        refs, notes = [], []
        for fam, value, assets, note in zip(frame["family"], frame["value"], frame["assets"], frame["note"]):
            if np.isfinite(value):
                g = make_distortion(fam, value)
                refs.append(handles.distortion_reference(g))
                note = note or _grid_note(m, Layer.aggregate(0.0, assets), g)
            else:
                refs.append("")
            notes.append(note)
    frame.insert(3, "distortion", refs)
    frame["note"] = notes
    return _table(frame, columns)


@xl_func(category=CATEGORY, volatile=False)
@_help("model", "attachments", "limits", "target_return", "standard", "level", "families", *_TOWER_TAIL, "columns",
       **TOWER_HELP)
@xl_ret(expand="table")
@cell_function
def LW_TARGET_TOWER(model, attachments, limits, target_return, standard, level, families=None, shares=None,
                    basis=None, reinstatements=None, agg_deductibles=None, columns=None):
    """A tower priced with each family calibrated so the whole portfolio earns the target return: one block of rows per family."""
    terms = functions._tower_terms(attachments, limits, shares, basis, reinstatements, agg_deductibles)
    t = cells.number(target_return, "target_return")
    std = _standard(standard, level)
    fams = _family_names(families)
    with handles.model_in_use(model) as (_, m):
        with _engine(limit="limits"):
            frame = price_at_target(m, functions._tower_layers(m, terms), t, std, fams)
    return _table(frame, columns)


# =========================================================================== implied from a market price
@xl_func(category=CATEGORY, volatile=False)
@_help("model", "attachment", "limit", "price", "family", "quote", "share", "basis", "reinstatements", "agg_deductible")
@xl_ret()
@cell_function
def LW_IMPLIED_PARAMETER(model, attachment, limit, price, family, quote=None, share=None, basis=None,
                         reinstatements=None, agg_deductible=None):
    """Parameter of a distortion family whose premium for the layer equals the observed market price."""
    t = _terms(attachment, limit, share, basis, reinstatements, agg_deductible)
    observed = cells.number(price, "price", low=0.0)
    how = cells.choice(quote, "quote", _QUOTES, default="premium")
    fam = cells.text(family, "family")
    with handles.model_in_use(model) as (_, m):
        layer = _layer(m, t)
        with _engine(premium="price", rate_on_line="price"):
            res = implied_parameter(m, layer, fam, **{how: observed})
        _vouch(m, layer, res.distortion)
        return res.value


@xl_func(category=CATEGORY, volatile=False)
@_help(
    "model", "attachments", "limits", "market_layer", "price", "quote", "families", "measure", *_TOWER_TAIL,
    market_layer="Which layer of the tower has the observed price: its position in the tower, 1 for the first.",
    measure="What each family column shows: premium (the default), rate_on_line, loss_ratio, margin or return_on_capital.",
    **TOWER_HELP,
)
@xl_ret(expand="table")
@cell_function
def LW_IMPLIED_SPREAD(model, attachments, limits, market_layer, price, quote=None, families=None, measure=None,
                      shares=None, basis=None, reinstatements=None, agg_deductibles=None):
    """Every layer priced by each family implied from one layer's market price: a column per family, then low, high and spread."""
    terms = functions._tower_terms(attachments, limits, shares, basis, reinstatements, agg_deductibles)
    k = len(terms)
    i = cells.integer(market_layer, "market_layer", low=1)
    if i > k:
        raise CellInputError("market_layer", f"the tower has {k} layer(s), got {i}")
    observed = cells.number(price, "price", low=0.0)
    how = cells.choice(quote, "quote", _QUOTES, default="premium")
    fams = _family_names(families)
    what = cells.choice(measure, "measure", _MEASURES, default="premium")
    with handles.model_in_use(model) as (_, m):
        layers = functions._tower_layers(m, terms)
        with _engine(premium="price", rate_on_line="price", limit="limits"):
            frame = implied_spread(m, layers, i - 1, families=fams, measure=what, **{how: observed})
            notes = [""] * k
            for fam, value in frame.attrs["parameters"].items():
                notes = [a or b for a, b in zip(notes, _warnings(m, layers, make_distortion(fam, value)))]
    if any(notes):
        frame["warning"] = notes
    return cells.table_to_cells(frame)


# =========================================================================== allocation
@xl_func(category=CATEGORY, volatile=False)
@_help(
    "model", "distortion", "standard", "level", "breaks", "columns",
    breaks="Interior boundaries of the capital slices, increasing inside (0, assets): a range; empty = one slice from 0 to the assets.",
)
@xl_ret(expand="table")
@cell_function
def LW_ALLOCATE_LAYERS(model, distortion, standard, level, breaks=None, columns=None):
    """Premium, margin and capital of each slice 0-b1, b1-b2, ..., up to the assets, then the portfolio's total row."""
    g = handles.distortion_from(distortion)
    std = _standard(standard, level)
    b = cells.vector(breaks, "breaks", low=0.0, default=())
    with handles.model_in_use(model) as (_, m):
        frame = allocate_to_layers(m, g, std, b)
        a = float(frame["limit"].iloc[-1])  # the total row: 0 to the assets
        notes = _warnings(m, capital_layers(a, b) + [Layer.aggregate(0.0, a)], g)
    if any(notes):
        frame["warning"] = notes
    return _table(frame, columns)


def _unit_table(value):
    """(names or None, years x units array) from a range of annual losses with an optional header row of names."""
    if isinstance(value, np.ndarray) and value.dtype.kind in "fiu":
        arr = value.astype(np.float64)
        return None, arr.reshape(-1, 1) if arr.ndim < 2 else arr
    rows = value.tolist() if isinstance(value, np.ndarray) else value
    if not isinstance(rows, (list, tuple)):
        rows = [[rows]]
    elif rows and not any(isinstance(r, (list, tuple)) for r in rows):
        rows = [[v] for v in rows]  # a 1-D list: one column
    rows = [list(r) if isinstance(r, (list, tuple)) else [r] for r in rows]
    width = max((len(r) for r in rows), default=0)
    rows = [r + [None] * (width - len(r)) for r in rows]
    while rows and all(cells.is_empty(v) for v in rows[-1]):
        rows.pop()  # a generous selection: trailing empty rows
    while width and all(cells.is_empty(r[width - 1]) for r in rows):
        width -= 1  # and trailing empty columns
        rows = [r[:width] for r in rows]
    if not rows or not width:
        raise CellInputError("units", "is empty")
    names = None
    first = [cells.single(v, "units") for v in rows[0]]
    if all(isinstance(v, str) and not cells.is_empty(v) for v in first):
        for j, v in enumerate(first):
            if cells.is_error_value(v):
                raise cells.UpstreamError("units", v, f"header cell {j + 1} ")
        names = [v.strip() for v in first]
        rows = rows[1:]
        if not rows:
            raise CellInputError("units", "has a header row but no annual losses below it")
    try:
        if all(type(v) in (float, int) for r in rows for v in r):
            return names, np.array(rows, dtype=np.float64)
    except (TypeError, ValueError):  # pragma: no cover - defensive
        pass
    out = np.empty((len(rows), width))
    top = 1 if names is not None else 0
    for i, r in enumerate(rows):
        for j, v in enumerate(r):
            where = f"row {i + 1 + top}, column {j + 1} "
            v = cells.single(v, "units")
            if cells.is_empty(v):
                raise CellInputError("units", f"{where}is empty")
            if isinstance(v, str) and cells.is_error_value(v):
                raise cells.UpstreamError("units", v, where)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
                raise CellInputError("units", f"{where}holds {cells._describe(v)}, expected a number")
            out[i, j] = float(v)
    return names, out


def _is_reference_range(value) -> bool:
    """True when every filled cell of ``value`` holds text other than an error value."""
    flat = [v for v in cells.grid(value)[2] if not cells.is_empty(v)]
    return bool(flat) and all(isinstance(v, str) for v in flat)


@xl_func(category=CATEGORY, volatile=False)
@_help(
    "units", "distortion", "standard", "level", "names", "weights", "columns",
    units="Units: a range of model references (frequency-severity models with the same bucket, or year loss/year-event tables of the same years), or annual losses, one column per unit, one row per year, optional header row of names.",
    names="Name of each unit: a range or comma-separated text; empty = the header row, or unit 1, unit 2, ...",
    weights="Weight of each simulated year, >= 0 (for a range of annual losses): a one-column range; empty = equally likely years.",
)
@xl_arg("units", ndim=2)
@xl_ret(expand="table")
@cell_function
def LW_ALLOCATE_UNITS(units, distortion, standard, level, names=None, weights=None, columns=None):
    """Natural allocation of the portfolio's premium, margin, assets and capital to its units; last row the total."""
    g = handles.distortion_from(distortion)
    std = _standard(standard, level)
    labels = None
    if not cells.is_empty(names):
        labels = []
        for t in _texts(names, "names"):
            labels.extend(x.strip() for x in t.split(",") if x.strip())
    w = cells.vector(weights, "weights", low=0.0, default=None)
    if _is_reference_range(units):
        refs = _texts(units, "units")
        with ExitStack() as stack:
            models = []
            for j, ref in enumerate(refs):
                try:
                    models.append(stack.enter_context(handles.model_in_use(ref, "units"))[1])
                except InputError as exc:
                    code = getattr(exc, "code", "#VALUE!")
                    err = CellInputError("units", f"cell {j + 1}: {exc.message}")
                    err.code = code
                    raise err from None
            if all(isinstance(m, (YearLossTable, YearEventTable)) for m in models):
                models = [m if isinstance(m, YearLossTable) else _year_totals(m) for m in models]
            elif not all(isinstance(m, FrequencySeverity) for m in models):
                kinds = sorted({handles.model_kind(m) for m in models})
                raise CellInputError("units", "expected frequency-severity models with the same bucket, or year loss "
                                              f"and year-event tables of the same simulated years; got {', '.join(kinds)}")
            if w is not None and all(isinstance(m, FrequencySeverity) for m in models):
                raise CellInputError("weights", "apply to simulated years; leave empty for frequency-severity units")
            frame = allocate_to_units(models, g, std, weights=w, names=labels)
    else:
        header, table = _unit_table(units)
        frame = allocate_to_units(table, g, std, weights=w, names=labels if labels is not None else header)
    return _table(frame, columns)


def _year_totals(m: YearEventTable) -> YearLossTable:
    """A year-event table's annual totals as a year loss table of the same years."""
    return YearLossTable(np.bincount(m.years, weights=m.losses, minlength=m.n_years))


# =========================================================================== sensitivities
@xl_func(category=CATEGORY, volatile=False)
@_help(
    "model", "attachments", "limits", "distortion", *_TOWER_TAIL, "columns",
    distortion="Distortion reference or typed form; a range of several gives one block of rows per distortion.",
    **TOWER_HELP,
)
@xl_ret(expand="table")
@cell_function
def LW_SENSITIVITY(model, attachments, limits, distortion, shares=None, basis=None, reinstatements=None,
                   agg_deductibles=None, columns=None):
    """Change in each layer's premium per unit change in the distortion parameter, the attachment and the limit."""
    terms = functions._tower_terms(attachments, limits, shares, basis, reinstatements, agg_deductibles)
    g = _distortions(distortion)
    with handles.model_in_use(model) as (_, m):
        layers = functions._tower_layers(m, terms)
        with _engine(limit="limits"):
            frame = price_sensitivities(m, layers, g)
            notes = _warnings(m, layers, g)
    if any(notes):
        frame["warning"] = notes
    return _table(frame, columns)


# =========================================================================== paid reinstatements
_REINSTATEMENT_ARGS = dict(
    attachment="Attachment of the per-occurrence layer in currency units, >= 0 (applied to each loss).",
    limit="Per-occurrence limit of the layer in currency units, > 0 (finite).",
    rates="Premium rate of each paid reinstatement, as a fraction of the upfront premium (1 = 100%, 0 = free): a range, one cell per reinstatement; empty = no reinstatement.",
)


def _reinstatement_price(model, attachment, limit, distortion, rates, share):
    a = cells.number(attachment, "attachment", low=0.0)
    lim = cells.number(limit, "limit", low=0.0, low_open=True)
    g = handles.distortion_from(distortion)
    c = cells.vector(rates, "rates", low=0.0, default=np.zeros(0))
    s = cells.number(share, "share", default=1.0, low=0.0, high=1.0, low_open=True)
    with handles.model_in_use(model) as (_, m):
        if not m.occurrence_terms:
            raise CellInputError("model", f"a {handles.model_kind(m)} holds annual totals only; paid reinstatements apply "
                                          "per occurrence: use a year-event table or a frequency-severity model")
        res = price_with_reinstatements(m, a, lim, c, g, share=s)
        note = _grid_note(m, Layer.occurrence(a, lim, reinstatements=c.size, share=s), g)
    return res, note


@xl_func(category=CATEGORY, volatile=False)
@_help(
    "model", "attachment", "limit", "distortion", "rates", "share", "quantity",
    quantity="Which figure: upfront (the default), expected_reinstatement, total, expected_loss, loss_ratio, upfront_loss_ratio, rate_on_line or premium_free_reinstatements.",
    **_REINSTATEMENT_ARGS,
)
@xl_ret()
@cell_function
def LW_REINSTATEMENT_PREMIUM(model, attachment, limit, distortion, rates=None, share=None, quantity=None):
    """Upfront premium of a per-occurrence layer whose reinstatements are paid, priced so the distortion finds it fair."""
    what = cells.choice(quantity, "quantity", _REINSTATEMENT_QUANTITIES, default="upfront_premium")
    res, note = _reinstatement_price(model, attachment, limit, distortion, rates, share)
    if note:
        raise functions.GridToleranceError("model", f"not within the grid tolerance: {note}")
    return getattr(res, _REINSTATEMENT_ROWS[what])


@xl_func(category=CATEGORY, volatile=False)
@_help("model", "attachment", "limit", "distortion", "rates", "share", **_REINSTATEMENT_ARGS)
@xl_ret(expand="table")
@cell_function
def LW_REINSTATEMENT_TABLE(model, attachment, limit, distortion, rates=None, share=None):
    """Paid reinstatements in full: upfront, expected reinstatement and total premium, loss ratios, rate on line, method."""
    res, note = _reinstatement_price(model, attachment, limit, distortion, rates, share)
    rows = [(label, getattr(res, field)) for label, field in _REINSTATEMENT_ROWS.items()]
    return _pairs(rows + ([("warning", note)] if note else []))


# =========================================================================== loads
@xl_func(category=CATEGORY, volatile=False)
@_help(
    "technical", "brokerage", "expenses",
    technical="Technical premium (the risk-loaded price of the loss), >= 0; or a range of them (the result has the same shape).",
    brokerage="Brokerage as a fraction of the gross premium, in [0, 1); empty = 0.",
    expenses="Other expenses as a fraction of the gross premium, in [0, 1); brokerage + expenses < 1; empty = 0.",
)
@xl_arg("technical", ndim=2)
@xl_ret(expand="table")
@cell_function
def LW_GROSS_PREMIUM(technical, brokerage=None, expenses=None):
    """Gross premium from technical: technical / (1 - brokerage - expenses)."""
    b = cells.number(brokerage, "brokerage", default=0.0)
    e = cells.number(expenses, "expenses", default=0.0)
    gross_premium(0.0, b, e)  # checks the loads once, before any cell

    def gross(v):
        t = cells.number(v, "technical", low=0.0)
        with np.errstate(over="ignore"):
            x = gross_premium(t, b, e)
        if not math.isfinite(x):
            raise _NumberError("technical", f"the gross premium {t:.6g} / {1.0 - b - e:.6g} is too large for a number")
        return x

    if isinstance(technical, (list, tuple, np.ndarray)) and len(cells.grid(technical)[2]) > 1:
        rows = technical.tolist() if isinstance(technical, np.ndarray) else list(technical)
        if not all(isinstance(r, (list, tuple)) for r in rows):
            rows = [[v] for v in rows]  # a 1-D list: one column
        return [[gross(v) for v in r] for r in rows]
    return gross(technical)


# =========================================================================== registry
FUNCTIONS: dict[str, object] = {
    name: obj for name, obj in sorted(globals().items())
    if name.startswith("LW_") and callable(obj) and hasattr(obj, "__xlfunc__")
}
TABLES = frozenset(n for n, f in FUNCTIONS.items() if f.__xlfunc__["ret"]["options"].get("expand"))

functions.register(FUNCTIONS)
