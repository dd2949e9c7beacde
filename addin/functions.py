"""The published worksheet functions: one thin LW_ function per engine capability.

Each function takes cell-shaped values (see :mod:`layerwise.addin.cells`),
converts them, calls the engine, and returns a cell value, a reference text
(see :mod:`layerwise.addin.handles`) or a table (a list of rows with a header
row, spilled from the calling cell). Every function is wrapped by
:func:`cell_function`, so bad input or any failure comes back as a text error
value such as ``#VALUE! LW_PREMIUM(limit): must lie in (0, inf], got -5``
and never raises.

Layer terms are given inline: ``attachment``, ``limit`` (a number, or the word
"unlimited"), then optional ``share`` (default 1), ``basis``, ``reinstatements``
and ``agg_deductible``. The default basis is *per occurrence* for models that
hold individual losses (frequency-severity models and year-event tables) and
*the annual total* for models that hold annual totals only (year loss tables
and scenario tables). ``reinstatements`` (a whole number; empty = unlimited)
sets a per-occurrence layer's aggregate limit to limit x (1 + reinstatements);
``agg_deductible`` is an annual aggregate deductible on a per-occurrence layer.
An aggregate layer is ``limit`` xs ``attachment`` on the year's total loss.

:data:`FUNCTIONS` maps each published name to its plain Python callable (for
headless recalculation); :func:`describe_functions` lists names, descriptions
and argument help texts (for the function reference).
"""
from __future__ import annotations

import functools
import inspect
import logging
import warnings
import math

import numpy as np

try:
    import xlwings as xw
except ImportError:
    # A Python without xlwings (e.g. one running inside a browser, see addin/export.py): no-op stand-ins like
    # xlwings' own off Windows, so the shims below record the metadata themselves.
    import types

    def _no_op(*args, **kwargs):
        return lambda f: f

    xw = types.SimpleNamespace(func=_no_op, arg=_no_op, ret=_no_op)

from layerwise.engine.distortions import Blend, TableDistortion, TVaRDistortion, make_distortion
from layerwise.engine.errors import GridWarning, InputError
from layerwise.engine.frequency import make_frequency
from layerwise.engine.layers import Layer
from layerwise.engine.models import FrequencySeverity, ScenarioTable, YearEventTable, YearLossTable
from layerwise.engine.pricing import COLUMNS, _mean_note, layer_statistics, price_layers
from layerwise.engine.severity import make_severity

from . import cells, handles
from .cells import CellInputError

__all__ = ["FUNCTIONS", "describe_functions", "cell_function", "CATEGORY", "HELP"]

log = logging.getLogger("layerwise.addin")

# The bridge turns a grid result outside its tolerance into a #NUM! error value or a warning column,
# so the engine's GridWarning (attributed to the bridge module that called price_layers) would only
# repeat it in the function server's log, once per distinct message.
warnings.filterwarnings("ignore", category=GridWarning, module=r"layerwise\.addin(\.|$)")

CATEGORY = "layerwise"  # Excel's function-wizard category

# One-line argument help texts (Excel shows at most 255 characters).
HELP = {
    "model": "Model reference from an LW_MODEL_ function (or a typed 'freqsev(poisson 5, lognormal 2e6 2.5)').",
    "attachment": "Layer attachment (retention) in currency units, >= 0: per loss for an occurrence layer, on the annual total for an aggregate layer.",
    "limit": "Layer limit in currency units, > 0, or 'unlimited'.",
    "distortion": "Distortion reference from LW_DISTORTION, LW_DISTORTION_BLEND or LW_DISTORTION_TABLE, or typed, e.g. 'wang 0.4', 'ph 0.8', 'tvar 99%'.",
    "share": "Share of the layer written, in (0, 1]; empty = 1 (100%).",
    "basis": "'occurrence' (each loss) or 'aggregate' (annual total); empty = per occurrence for frequency-severity and year-event models, annual total for year loss and scenario tables.",
    "reinstatements": "Number of reinstatements of a per-occurrence layer (aggregate limit = limit x (1 + n)); empty = unlimited.",
    "agg_deductible": "Annual aggregate deductible of a per-occurrence layer, >= 0; empty = none.",
}

_BASES = {
    "occurrence": "occurrence", "occ": "occurrence", "per_occurrence": "occurrence", "each_loss": "occurrence",
    "event": "occurrence", "per_event": "occurrence",
    "aggregate": "aggregate", "agg": "aggregate", "annual": "aggregate", "annual_total": "aggregate",
    "stop_loss": "aggregate",
}
_STATISTICS = {
    "expected_loss": "expected_loss", "mean": "expected_loss", "el": "expected_loss",
    "std": "std", "sd": "std", "stdev": "std", "standard_deviation": "std",
    "cv": "cv", "coefficient_of_variation": "cv",
    "prob_attach": "prob_attach", "attach": "prob_attach", "probability_of_attachment": "prob_attach",
    "prob_exhaust": "prob_exhaust", "exhaust": "prob_exhaust", "probability_of_exhaustion": "prob_exhaust",
    "var": "var", "quantile": "var", "value_at_risk": "var",
    "tvar": "tvar", "tail_value_at_risk": "tvar", "expected_shortfall": "tvar",
}
_METHODS = {"moment": "moment", "moments": "moment", "rounding": "rounding", "round": "rounding"}
_IDENTITY = TVaRDistortion(0.0)  # g(s) = s: prices at the expected loss


# =========================================================================== xlwings decorators
# In Excel (Windows, classic add-in) xw.func / xw.arg / xw.ret are xlwings.udfs' decorators, which
# record the function's metadata in ``f.__xlfunc__`` for "Import Python UDFs" (the docstring becomes
# the function description, ``doc=`` the argument help). Elsewhere (Linux, macOS, headless) xlwings
# 0.37 exports no-op stand-ins, so the shims below still call xw.*, and only when that recorded
# nothing they record the same metadata themselves: the function reference, the tests and the
# headless path then see exactly what Excel would register.
def _probe():
    """probe"""


_NATIVE = hasattr(xw.func(_probe), "__xlfunc__")


def _meta(f):
    if not hasattr(f, "__xlfunc__"):
        args = []
        for pos, p in enumerate(inspect.signature(f).parameters.values()):
            if p.kind not in (p.POSITIONAL_OR_KEYWORD, p.VAR_POSITIONAL):
                raise TypeError("xlwings does not support UDFs with keyword arguments")
            info = {"name": p.name, "pos": pos, "vba": None, "doc": f"Positional argument {pos + 1}",
                    "vararg": p.kind is p.VAR_POSITIONAL, "options": {}}
            if p.default is not p.empty:
                info["optional"] = p.default
            args.append(info)
        f.__xlfunc__ = {
            "name": f.__name__, "sub": False, "args": args, "argmap": {a["name"]: a for a in args},
            "ret": {"doc": f.__doc__ if f.__doc__ is not None else f"Python function '{f.__name__}'", "options": {}},
            "category": "xlwings", "call_in_wizard": True, "volatile": False, "async_mode": None,
        }
    return f


def xl_func(**options):
    """``@xw.func(**options)``; records the metadata when xlwings' decorator is a stand-in."""

    def inner(f):
        f = xw.func(**options)(f)
        if not _NATIVE:
            meta = _meta(f).__xlfunc__
            meta["category"] = options.get("category", "xlwings")
            meta["call_in_wizard"] = bool(options.get("call_in_wizard", True))
            meta["volatile"] = bool(options.get("volatile", False))
            meta["async_mode"] = options.get("async_mode")
        return f

    return inner


def xl_arg(name: str, **options):
    """``@xw.arg(name, **options)`` (``doc=`` is the argument's help text)."""

    def inner(f):
        f = xw.arg(name, **options)(f)
        if not _NATIVE:
            meta = _meta(f).__xlfunc__
            if name not in meta["argmap"]:
                raise TypeError(f"Invalid argument name {name!r}.")
            a = meta["argmap"][name]
            opts = dict(options)
            for special in ("vba", "doc"):
                if special in opts:
                    a[special] = opts.pop(special)
            a["options"].update(opts)
        return f

    return inner


def xl_ret(**options):
    """``@xw.ret(**options)``, e.g. ``expand="table"`` for a spilled table."""

    def inner(f):
        f = xw.ret(**options)(f)
        if not _NATIVE:
            _meta(f).__xlfunc__["ret"]["options"].update(options)
        return f

    return inner


# =========================================================================== the wrapper
def cell_function(fn):
    """Make ``fn`` safe for a cell: errors become text error values naming the function and argument.

    Also turns scalar results into cell values (NaN/inf become #NUM! error values).
    Apply it first (innermost), then the xlwings decorators (``xl_ret``, ``xl_arg``, ``xl_func`` outermost).
    """
    name = fn.__name__
    sig = inspect.signature(fn)
    params = set(sig.parameters)

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            sig.bind(*args, **kwargs)
        except TypeError as exc:
            return cells.error_value("#VALUE!", name, "arguments", str(exc))
        try:
            out = fn(*args, **kwargs)
        except InputError as exc:
            code = getattr(exc, "code", "#VALUE!")
            if exc.argument not in params and "model" in params:
                # e.g. a model's own bucket that does not fit the layer: report it under the model
                return cells.error_value(code, name, "model", f"{exc.argument}: {exc.message}")
            return cells.error_value(code, name, exc.argument, exc.message)
        except Exception as exc:  # never let a failure out of the bridge
            log.exception("%s failed", name)
            return cells.error_value("#VALUE!", name, "internal", f"{type(exc).__name__}: {exc}")
        if isinstance(out, list):
            return out
        return cells.to_cell(out, name)

    wrapper.__cell_function__ = True
    return wrapper


def _args(*names, **docs):
    """Apply xlwings' ``@xl_arg(name, doc=..., err_to_str=True)`` for each argument (help from HELP or ``docs``)."""

    def inner(f):
        for n in reversed(names):
            f = xl_arg(n, doc=docs.get(n, HELP.get(n)), err_to_str=True)(f)
        return f

    return inner


# =========================================================================== helpers
def _blamed(argument, fn, *args):
    """Call an engine constructor; its InputErrors are reported under ``argument``."""
    try:
        return fn(*args)
    except CellInputError:
        raise
    except InputError as exc:
        detail = exc.message if exc.argument == argument else f"{exc.argument}: {exc.message}"
        raise CellInputError(argument, detail) from None


def _params(values, first: str = "param"):
    """Positional parameters param1, param2, ... (floats), stopping at the first empty one."""
    out, gap = [], None
    for i, v in enumerate(values, start=1):
        x = cells.number(v, f"{first}{i}", default=None)
        if x is None:
            gap = gap or i
        elif gap is not None:
            raise CellInputError(f"{first}{i}", f"is given but {first}{gap} is empty")
        else:
            out.append(x)
    return out


def _texts(value, argument: str) -> list[str]:
    """Texts of a one-row or one-column range (trailing empties dropped)."""
    r, c, flat = cells.grid(value)
    while flat and cells.is_empty(flat[-1]):
        flat.pop()
    if not flat:
        raise CellInputError(argument, "is empty")
    if r > 1 and c > 1:
        raise CellInputError(argument, f"expected one row or one column, got {r} rows x {c} columns")
    out = []
    for i, v in enumerate(flat):
        if cells.is_empty(v):
            raise CellInputError(argument, f"cell {i + 1} is empty")
        out.append(cells.text(v, argument))
    return out


def _terms(attachment, limit, share, basis, reinstatements, agg_deductible) -> dict:
    return {
        "attachment": cells.number(attachment, "attachment", low=0.0),
        "limit": cells.number(limit, "limit", low=0.0, low_open=True, allow_inf=True),
        "share": cells.number(share, "share", default=1.0, low=0.0, high=1.0, low_open=True),
        "basis": cells.choice(basis, "basis", _BASES, default=None),
        "reinstatements": _reinstatements(reinstatements, "reinstatements"),
        "agg_deductible": cells.number(agg_deductible, "agg_deductible", default=0.0, low=0.0),
    }


def _reinstatements(value, argument):
    v = cells.single(value, argument)
    if isinstance(v, str) and v.strip().lower() in cells.INF_WORDS:
        return None
    return cells.integer(v, argument, default=None, low=0)


def _layer(model, t: dict) -> Layer:
    basis = t["basis"] or ("occurrence" if model.occurrence_terms else "aggregate")
    if basis == "occurrence":
        if not model.occurrence_terms:
            raise CellInputError(
                "basis",
                f"a {handles.model_kind(model)} holds annual totals only, so its layers apply to the annual total: "
                "leave basis empty or give 'aggregate'",
            )
        if t["reinstatements"] is not None and not math.isfinite(t["limit"]):
            raise CellInputError("reinstatements", "need a finite limit")
        return Layer.occurrence(t["attachment"], t["limit"], reinstatements=t["reinstatements"],
                                agg_deductible=t["agg_deductible"], share=t["share"])
    if t["reinstatements"] is not None:
        raise CellInputError("reinstatements", "apply to per-occurrence layers; leave empty for an aggregate layer")
    if t["agg_deductible"]:
        raise CellInputError("agg_deductible", "applies to per-occurrence layers; an aggregate layer's attachment is its deductible")
    return Layer.aggregate(t["attachment"], t["limit"], share=t["share"])


class GridToleranceError(CellInputError):
    """A grid result outside its tolerance (see price_layers' warning column): #NUM!, under the model."""

    code = "#NUM!"


def _within_tolerance(row):
    """The priced row, or a #NUM! error when the engine flagged it: a cell shows no number it cannot vouch for."""
    note = row.get("warning", "")
    if note:
        raise GridToleranceError("model", f"not within the grid tolerance: {note}")
    return row


def _priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible):
    """The engine's priced row (a Series with COLUMNS) for one inline layer; #NUM! past the grid tolerances."""
    g = _IDENTITY if distortion is _IDENTITY else handles.distortion_from(distortion)
    t = _terms(attachment, limit, share, basis, reinstatements, agg_deductible)
    with handles.model_in_use(model) as (_, m):
        return _within_tolerance(price_layers(m, [_layer(m, t)], g).iloc[0])


def _collateralised(row, column):
    """A capital figure of a priced row; an unbounded collateral gets an error that says what to give."""
    if not math.isfinite(row["collateral"]):
        err = InputError(
            "reinstatements",
            "capital is unbounded: the layer can pay without limit in a year; give a number of reinstatements or an aggregate limit",
        )
        err.code = "#NUM!"  # the inputs are valid; the result is not a finite number
        raise err
    if column in ("return_on_capital", "leverage") and not row["capital"] > 0:
        err = InputError(
            "distortion",
            f"no return can be stated: the premium {row['premium']:.6g} takes the whole collateral "
            f"{row['collateral']:.6g}, so the layer needs no capital (a distortion this strong prices the layer at its limit)",
        )
        err.code = "#NUM!"
        raise err
    return row[column]


# =========================================================================== builders
@xl_func(category=CATEGORY, volatile=False)
@_args(
    "family", "param1", "param2", "param3", "param4",
    family="Severity family: lognormal, gamma, pareto, single_pareto, weibull, exponential, generalized_pareto, or any continuous scipy.stats name.",
    param1="First parameter: mean for lognormal, gamma, exponential; shape for pareto, single_pareto, weibull, generalized_pareto; scipy's first argument otherwise.",
    param2="Second parameter: cv for lognormal and gamma; scale for pareto, weibull, generalized_pareto; threshold for single_pareto; empty if none.",
    param3="Third parameter (scipy distributions only, e.g. loc); empty if none.",
    param4="Fourth parameter (scipy distributions only, e.g. scale); empty if none.",
)
@xl_ret()
@cell_function
def LW_SEVERITY(family, param1, param2=None, param3=None, param4=None):
    """Single-loss size distribution from its family and parameters; returns its reference text."""
    fam = cells.text(family, "family")
    key = cells._key(fam)
    params = _params([param1, param2, param3, param4])
    if key in _SEVERITY_PARAMS:
        names = _SEVERITY_PARAMS[key]
    elif handles._is_scipy_continuous(fam):
        from scipy import stats

        shapes = [n.strip() for n in (getattr(stats, fam).shapes or "").split(",") if n.strip()]
        names = shapes + ["loc", "scale"]
    else:
        raise CellInputError("family", f"unknown severity {fam!r}; choose {handles._SEVERITY_NAMES}")
    _check_arity(fam, params, names, required=len(_SEVERITY_PARAMS.get(key, names[:-2])))
    try:
        sev = make_severity(key if key in _SEVERITY_PARAMS else fam, *params)
    except InputError as exc:
        arg = exc.argument
        if arg in names:
            where = f"param{names.index(arg) + 1}"
        elif arg.startswith("parameter "):
            where = "param" + arg.split()[-1]
        elif arg in ("severity", "name"):
            where = "family"  # e.g. a scipy distribution not supported on [0, inf)
        else:
            where = "param1"
        raise CellInputError(where, f"{arg}: {exc.message}") from None
    return handles.severity_spec(sev)


_SEVERITY_PARAMS = {  # positional parameters of the engine's named severities
    "lognormal": ["mean", "cv"], "gamma": ["mean", "cv"], "exponential": ["mean"],
    "pareto": ["shape", "scale"], "weibull": ["shape", "scale"], "generalized_pareto": ["shape", "scale"],
    "single_pareto": ["shape", "threshold"],
}
_FREQUENCY_PARAMS = {
    "poisson": ["mean"], "negative_binomial": ["mean", "cv"], "negbin": ["mean", "cv"], "binomial": ["n", "q"],
    "fixed": ["n"], "fixed_count": ["n"],
}


def _check_arity(family: str, params: list, names: list[str], required: int):
    if len(params) < required:
        raise CellInputError(f"param{len(params) + 1}", f"is required: {family} takes {', '.join(names[:required])}")
    if len(params) > len(names):
        raise CellInputError(f"param{len(names) + 1}", f"must be empty: {family} takes {', '.join(names)}")


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "family", "param1", "param2",
    family="Claim-count family: poisson, negative_binomial, binomial or fixed.",
    param1="First parameter: the mean for poisson and negative_binomial; the number of exposures n for binomial; the count for fixed.",
    param2="Second parameter: the claim-count cv for negative_binomial (above 1/sqrt(mean)); the claim probability q for binomial; empty otherwise.",
)
@xl_ret()
@cell_function
def LW_FREQUENCY(family, param1, param2=None):
    """Annual claim-count distribution from its family and parameters; returns its reference text."""
    fam = cells.text(family, "family")
    key = cells._key(fam)
    params = _params([param1, param2])
    if key not in _FREQUENCY_PARAMS:
        raise CellInputError("family", f"unknown frequency {fam!r}; choose poisson, negative_binomial, binomial or fixed")
    names = _FREQUENCY_PARAMS[key]
    _check_arity(fam, params, names, required=len(names))
    try:
        freq = make_frequency(key, *params)
    except InputError as exc:
        where = f"param{names.index(exc.argument) + 1}" if exc.argument in names else "param2"
        raise CellInputError(where, f"{exc.argument}: {exc.message}") from None
    return handles.frequency_spec(freq)


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "frequency", "severity", "bucket", "grid_length", "method",
    frequency="Claim-count reference from LW_FREQUENCY, or typed, e.g. 'poisson 5'.",
    severity="Loss-size reference from LW_SEVERITY, or typed, e.g. 'lognormal 2e6 2.5'.",
    bucket="Grid spacing in currency units, > 0; empty = chosen automatically for each layer.",
    grid_length="Number of grid points, a power of 2 from 16 to 4194304; empty = chosen automatically.",
    method="Severity discretisation: 'moment' (keeps means, the default) or 'rounding'.",
)
@xl_ret()
@cell_function
def LW_MODEL_FREQSEV(frequency, severity, bucket=None, grid_length=None, method=None):
    """Frequency-severity loss model (annual aggregate by FFT); returns its reference text."""
    f = handles.frequency_from(frequency, "frequency")
    s = handles.severity_from(severity, "severity")
    h = cells.number(bucket, "bucket", default=None, low=0.0, low_open=True)
    n = cells.integer(grid_length, "grid_length", default=None, low=16)
    meth = cells.choice(method, "method", _METHODS, default="moment")
    return handles.freqsev_reference(f, s, h, n, meth, argument=None)


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "losses", "weights",
    losses="Annual losses, one per simulated year: a one-column (or one-row) range of numbers >= 0.",
    weights="Optional weight of each year, >= 0, same size as losses; empty = equally likely years.",
)
@xl_ret()
@cell_function
def LW_MODEL_YEARLOSS(losses, weights=None):
    """Loss model from a year loss table (one annual loss per simulated year); returns its reference."""
    x = cells.vector(losses, "losses", low=0.0)
    w = cells.vector(weights, "weights", low=0.0, default=None)
    if w is not None and w.size != x.size:
        raise CellInputError("weights", f"needs one weight per year ({x.size}), got {w.size}")
    return handles.data_reference("yearloss", (x, w), lambda: YearLossTable(x, w))


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "years", "losses", "n_years",
    years="Simulated year number of each event, whole numbers 1, 2, ...: a one-column range.",
    losses="Loss of each event, >= 0: a one-column range the same size as years.",
    n_years="Number of simulated years, including years without events; empty = the largest year number.",
)
@xl_ret()
@cell_function
def LW_MODEL_YEAREVENT(years, losses, n_years=None):
    """Loss model from a year-event table (events with their simulated year); returns its reference."""
    y = cells.vector(years, "years", low=1.0)
    x = cells.vector(losses, "losses", low=0.0)
    if y.size != x.size:
        raise CellInputError("losses", f"needs one loss per event year ({y.size}), got {x.size}")
    n = cells.integer(n_years, "n_years", default=None, low=1)
    resolved = n if n is not None else int(math.floor(y.max()))
    return handles.data_reference("yearevent", (y, x), lambda: YearEventTable(y, x, n), extra=str(resolved))


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "outcomes", "probabilities",
    outcomes="Annual loss of each scenario, >= 0: a one-column range.",
    probabilities="Probability of each scenario, in [0, 1] and summing to 1: a range the same size as outcomes.",
)
@xl_ret()
@cell_function
def LW_MODEL_SCENARIOS(outcomes, probabilities):
    """Loss model from discrete annual scenarios and their probabilities; returns its reference."""
    x = cells.vector(outcomes, "outcomes", low=0.0)
    p = cells.vector(probabilities, "probabilities", low=0.0)
    if p.size != x.size:
        raise CellInputError("probabilities", f"needs one probability per outcome ({x.size}), got {p.size}")
    return handles.data_reference("scenarios", (x, p), lambda: ScenarioTable(x, p))


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "family", "value",
    family="Distortion family: wang, proportional_hazard (ph), dual_power, tvar or cost_of_capital; or a whole typed form such as 'wang 0.4'.",
    value="The family's parameter: wang lam >= 0, ph r in (0, 1], dual_power m >= 1, tvar p in [0, 1), cost_of_capital roe >= 0; empty if family is typed in full.",
)
@xl_ret()
@cell_function
def LW_DISTORTION(family, value=None):
    """Distortion (risk-loading) function from its family and parameter; returns its reference text."""
    fam = cells.text(family, "family")
    x = cells.number(value, "value", default=None)
    if x is None:
        return handles.distortion_reference(handles.parse_distortion(fam, "family"))
    try:
        g = make_distortion(fam, x)
    except InputError as exc:
        if exc.argument == "family":
            raise CellInputError("family", exc.message) from None
        raise CellInputError("value", f"{exc.argument}: {exc.message}") from None
    return handles.distortion_reference(g)


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "distortions", "weights",
    distortions="Distortion references (or typed forms) to blend: a one-row or one-column range.",
    weights="Weight of each distortion, >= 0 and summing to 1: a range the same size as distortions.",
)
@xl_ret()
@cell_function
def LW_DISTORTION_BLEND(distortions, weights):
    """Weighted blend of distortions (weights sum to 1); returns its reference text."""
    texts = _texts(distortions, "distortions")
    comps = []
    for i, t in enumerate(texts):
        try:
            comps.append(handles.parse_distortion(t, "distortions"))
        except cells.MissingReference as exc:
            raise cells.MissingReference("distortions", f"cell {i + 1}: {exc.message}") from None
        except InputError as exc:
            raise CellInputError("distortions", f"cell {i + 1}: {exc.message}") from None
    w = cells.vector(weights, "weights", low=0.0)
    g = _blamed("weights", Blend, tuple(comps), tuple(w))
    return handles.distortion_reference(g)


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "s", "g", "require_concave",
    s="Survival probabilities of the points, from 0 to 1 inclusive: a one-column range.",
    g="Distorted probability g(s) at each point, from 0 to 1, non-decreasing: a range the same size as s.",
    require_concave="TRUE (default) to insist on a concave g, so prices never fall below expected loss; FALSE to allow any.",
)
@xl_ret()
@cell_function
def LW_DISTORTION_TABLE(s, g, require_concave=None):
    """Distortion through given points (s, g(s)), linear in between; returns its reference text."""
    xs = cells.vector(s, "s")
    ys = cells.vector(g, "g")
    concave = cells.boolean(require_concave, "require_concave", default=True)
    try:
        d = TableDistortion(tuple(xs), tuple(ys), concave)
    except InputError as exc:
        arg = exc.argument if exc.argument in ("s", "g") else "require_concave"
        raise CellInputError(arg, exc.message.replace("pass require_concave=False", "set require_concave to FALSE")) from None
    return handles.distortion_reference(d)


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "distortion", "s",
    s="Survival probability (or a range of them), each in [0, 1].",
)
@xl_arg("s", ndim=2)
@xl_ret(expand="table")
@cell_function
def LW_DISTORTION_VALUE(distortion, s):
    """Distorted probability g(s) for a survival probability s (or a range of them, same shape)."""
    g = handles.distortion_from(distortion)
    if isinstance(s, (list, tuple, np.ndarray)) and len(cells.grid(s)[2]) > 1:
        rows = s.tolist() if isinstance(s, np.ndarray) else list(s)
        if not all(isinstance(r, (list, tuple)) for r in rows):
            rows = [[v] for v in rows]  # a 1-D list: one column
        return [[float(g(cells.number(v, "s", low=0.0, high=1.0))) for v in r] for r in rows]
    return float(g(cells.number(s, "s", low=0.0, high=1.0)))


# =========================================================================== layer prices
_LAYER_TAIL = ("share", "basis", "reinstatements", "agg_deductible")


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_EXPECTED_LOSS(model, attachment, limit, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Expected annual loss to the layer (after share)."""
    return _priced(model, attachment, limit, _IDENTITY, share, basis, reinstatements, agg_deductible)["expected_loss"]


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_PREMIUM(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Risk-loaded technical premium of the layer: the integral of g(S(x)) over the layer, after share."""
    return _priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible)["premium"]


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_MARGIN(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Risk margin of the layer: premium minus expected loss."""
    return _priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible)["margin"]


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_LOSS_RATIO(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Expected loss ratio of the layer: expected loss divided by premium."""
    return _priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible)["loss_ratio"]


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_RATE_ON_LINE(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Rate on line of the layer: premium divided by the limit written (limit x share)."""
    return _priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible)["rate_on_line"]


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_CAPITAL(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Capital the layer consumes when fully collateralised: largest annual payment x share, less premium."""
    return _collateralised(_priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible), "capital")


@xl_func(category=CATEGORY, volatile=False)
@_args("model", "attachment", "limit", "distortion", *_LAYER_TAIL)
@xl_ret()
@cell_function
def LW_RETURN_ON_CAPITAL(model, attachment, limit, distortion, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """Return on the layer's capital: margin divided by capital (fully collateralised)."""
    return _collateralised(_priced(model, attachment, limit, distortion, share, basis, reinstatements, agg_deductible), "return_on_capital")


@xl_func(category=CATEGORY, volatile=False)
@_args(
    "model", "attachment", "limit", "statistic", "level", *_LAYER_TAIL,
    statistic="Which statistic of the layer's annual loss: expected_loss, std, cv, prob_attach, prob_exhaust, var or tvar.",
    level="Probability level for var and tvar, in [0, 1), e.g. 0.99; not used by the other statistics.",
)
@xl_ret()
@cell_function
def LW_LAYER_STAT(model, attachment, limit, statistic, level=None, share=None, basis=None, reinstatements=None, agg_deductible=None):
    """One statistic of the layer's annual loss after share: std, cv, attachment or exhaustion probability, VaR, TVaR."""
    stat = cells.choice(statistic, "statistic", _STATISTICS)
    p = None
    if stat in ("var", "tvar"):
        p = cells.number(level, "level", low=0.0, high=1.0, high_open=True)
    t = _terms(attachment, limit, share, basis, reinstatements, agg_deductible)
    with handles.model_in_use(model) as (_, m):
        lay = _layer(m, t)
        if p is None:
            return _within_tolerance(price_layers(m, [lay], _IDENTITY).iloc[0])[stat]
        _within_tolerance(price_layers(m, [lay], TVaRDistortion(p)).iloc[0])  # the grid checks at this level
        row = layer_statistics(m, [lay], [p]).iloc[0]
        return row[f"{stat}_{p:g}"]


# =========================================================================== tables
@xl_func(category=CATEGORY, volatile=False)
@_args(
    "model", "attachments", "limits", "distortion", "shares", "basis", "reinstatements", "agg_deductibles", "columns",
    attachments="Attachment of each layer (a range), or a single number to stack the limits contiguously from it.",
    limits="Limit of each layer, > 0 or 'unlimited': a one-row or one-column range.",
    distortion="Distortion reference or typed form; a range of several gives one block of rows per distortion.",
    shares="Share of each layer in (0, 1]: a range, or one value for all; empty = 1.",
    reinstatements="Reinstatements of each per-occurrence layer: a range (empty cell = unlimited), or one value for all.",
    agg_deductibles="Annual aggregate deductible of each per-occurrence layer: a range, or one value for all; empty = none.",
    columns="Columns to show, e.g. 'premium, rate_on_line' or a range of names; empty = all. Names: " + ", ".join(COLUMNS[:6]) + ", ...",
)
@xl_ret(expand="table")
@cell_function
def LW_TOWER(model, attachments, limits, distortion, shares=None, basis=None, reinstatements=None,
             agg_deductibles=None, columns=None):
    """Price a whole tower of layers: a spilled table with a header row and one row per layer."""
    terms = _tower_terms(attachments, limits, shares, basis, reinstatements, agg_deductibles)
    dists = _texts(distortion, "distortion")
    gs = {}
    for t in dists:
        gs.setdefault(t, handles.parse_distortion(t, "distortion"))
    with handles.model_in_use(model) as (_, m):
        layers = _tower_layers(m, terms)
        try:
            frame = price_layers(m, layers, gs if len(gs) > 1 else next(iter(gs.values())))
        except InputError as exc:
            if exc.argument != "limit":
                raise
            raise CellInputError("limits", exc.message) from None
    cols = _columns(columns, list(frame.columns))
    if "warning" not in cols and frame["warning"].astype(bool).any():
        cols.append("warning")  # a row outside the grid tolerances always shows why
    return cells.table_to_cells(frame, cols)


def _tower_terms(attachments, limits, shares, basis, reinstatements, agg_deductibles) -> list[dict]:
    """Per-layer terms of a tower given the LW_TOWER way (checked before the model is resolved)."""
    lims = cells.vector(limits, "limits", low=0.0, allow_inf_words=True)
    if np.any(lims <= 0):
        raise CellInputError("limits", f"cell {int(np.flatnonzero(lims <= 0)[0]) + 1} must be > 0")
    k = lims.size
    atts = cells.vector(attachments, "attachments", low=0.0)
    if atts.size == 1 and k > 1:
        if not np.all(np.isfinite(lims[:-1])):
            raise CellInputError("limits", "only the top layer of a stacked tower may be unlimited")
        atts = atts[0] + np.concatenate([[0.0], np.cumsum(lims[:-1])])
    elif atts.size != k:
        raise CellInputError("attachments", f"needs one attachment per limit ({k}) or a single start, got {atts.size}")
    share = _per_layer(shares, "shares", k, 1.0, low=0.0)
    if np.any((share <= 0) | (share > 1)):
        raise CellInputError("shares", "each share must lie in (0, 1]")
    rein = _per_layer(reinstatements, "reinstatements", k, math.nan, low=0.0, blanks=True, inf_words=True)
    rein[np.isposinf(rein)] = math.nan  # 'unlimited'
    if np.any(np.isfinite(rein) & (rein != np.floor(rein))):
        raise CellInputError("reinstatements", "must be whole numbers")
    aad = _per_layer(agg_deductibles, "agg_deductibles", k, 0.0, low=0.0)
    bas = cells.choice(basis, "basis", _BASES, default=None)
    return [{"attachment": atts[i], "limit": lims[i], "share": share[i], "basis": bas,
             "reinstatements": None if math.isnan(rein[i]) else int(rein[i]), "agg_deductible": aad[i]}
            for i in range(k)]


def _tower_layers(model, terms: list[dict]):
    """Engine layers from tower terms; a bad layer is reported with its position."""
    layers = []
    for i, t in enumerate(terms):
        try:
            layers.append(_layer(model, t))
        except InputError as exc:
            arg = {"agg_deductible": "agg_deductibles"}.get(exc.argument, exc.argument)
            raise CellInputError(arg, f"layer {i + 1}: {exc.message}") from None
    return layers


def _per_layer(value, argument, k, default, *, low, blanks=False, inf_words=False) -> np.ndarray:
    v = cells.vector(value, argument, low=low, default=None, allow_blanks=blanks, allow_inf_words=inf_words)
    if v is None:
        return np.full(k, default, dtype=float)
    if blanks and v.size < k <= len(cells.grid(value)[2]):
        v = np.concatenate([v, np.full(k - v.size, math.nan)])  # trailing empty cells: not set for those layers
    if v.size == 1:
        return np.full(k, v[0] if not np.isnan(v[0]) else default)
    if v.size != k:
        raise CellInputError(argument, f"needs one value per layer ({k}) or a single value, got {v.size}")
    return np.where(np.isnan(v), default, v)


def _columns(value, available: list[str]) -> list[str]:
    if cells.is_empty(value):
        return available
    names = []
    for t in _texts(value, "columns"):
        names.extend(x.strip() for x in t.split(",") if x.strip())
    out = []
    for n in names:
        key = cells._key(n)
        if key not in available:
            raise CellInputError("columns", f"unknown column {n!r}; choose from {', '.join(available)}")
        out.append(key)
    return out


@xl_func(category=CATEGORY, volatile=False)
@_args("model")
@xl_ret(expand="table")
@cell_function
def LW_MODEL_INFO(model):
    """Diagnostics of a model: kind, size, annual mean, std and cv, grid checks, memory and builds."""
    with handles.model_in_use(model) as (ref, m):
        u = m.annual()
        mean, std = u.mean(), u.std()
        rows = [
            ["reference", ref],
            ["kind", handles.model_kind(m)],
            ["description", m.describe()],
            ["annual mean", mean],
            ["annual std", std],
            ["annual cv", std / mean if mean > 0 else math.nan],
        ]
        if isinstance(m, YearLossTable):
            rows += [["years", m.losses.size], ["weighted", m.weights is not None]]
        elif isinstance(m, YearEventTable):
            rows += [["years", m.n_years], ["events", m.losses.size]]
        elif isinstance(m, ScenarioTable):
            rows += [["outcomes", m.outcomes.size]]
        elif isinstance(m, FrequencySeverity):
            d = u.diagnostics
            rows += [
                ["frequency", handles.frequency_spec(m.frequency)],
                ["severity", handles.severity_spec(m.severity)],
                ["expected claim count", m.frequency.mean],
                ["severity mean", m.severity.mean],
                ["severity cv", m.severity.cv],
                ["grid bucket", d.get("bucket", math.nan)],
                ["grid points", d.get("grid_length", math.nan)],
                ["grid top", d.get("grid_top", math.nan)],
                *([["grid bucket above the body", d["tail_bucket"]], ["grid body top", d["body_top"]]]
                  if "tail_bucket" in d else []),
                ["probability beyond grid", d.get("beyond", math.nan)],
                ["annual mean (exact)", d.get("mean", math.nan)],
                ["annual cv (exact)", d.get("cv", math.nan)],
                ["severity mean on the grid", d.get("severity_mean_grid", math.nan)],
                ["severity mean to the grid top (exact)", d.get("severity_mean_to_top", math.nan)],
                ["grid check", _mean_note(d) or "within tolerance"],
            ]
    rows += [["memory bytes", handles.CACHE.size_of(ref)], ["builds", handles.build_count(ref)]]
    return [["property", "value"]] + [[k, cells._table_value(v)] for k, v in rows]


@xl_func(category=CATEGORY, volatile=True)
@xl_ret(expand="table")
@cell_function
def LW_CACHE_INFO():
    """The model cache: memory cap and use, then one row per model held (reference, bytes, builds)."""
    c = handles.CACHE
    rows = [["reference", "bytes", "builds"], ["(cap)", float(c.cap), ""], ["(in use)", float(c.nbytes), ""]]
    rows += [[e["reference"], float(e["bytes"]), float(e["builds"])] for e in c.entries()]
    return rows


# =========================================================================== registry
FUNCTIONS: dict[str, object] = {
    name: obj for name, obj in sorted(globals().items())
    if name.startswith("LW_") and callable(obj) and hasattr(obj, "__xlfunc__")
}


def describe_functions() -> list[dict]:
    """Name, description, return shape and arguments (name, help, optional, default) of each function."""
    out = []
    for name, f in FUNCTIONS.items():
        meta = f.__xlfunc__
        out.append({
            "name": meta["name"],
            "description": meta["ret"]["doc"],
            "category": meta["category"],
            "volatile": meta["volatile"],
            "returns": "table" if meta["ret"]["options"].get("expand") else "value",
            "args": [
                {"name": a["name"], "help": a["doc"], "optional": "optional" in a, "default": a.get("optional")}
                for a in meta["args"]
            ],
        })
    return out


def register(more: dict) -> None:
    """Add the LW_ functions of another bridge module to :data:`FUNCTIONS` (kept in name order)."""
    clash = set(more) & {n for n, f in FUNCTIONS.items() if more.get(n) is not f}
    if clash:
        raise ValueError(f"published function names defined twice: {sorted(clash)}")
    merged = dict(sorted({**FUNCTIONS, **more}.items()))
    FUNCTIONS.clear()
    FUNCTIONS.update(merged)


# Portfolio functions (capital, calibration, allocation, reinstatements, loads) register themselves here.
from . import capital_functions  # noqa: E402,F401
