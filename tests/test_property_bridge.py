"""Bad input, property-tested: no cell value takes a published function down.

For every function in ``FUNCTIONS``, hypothesis generates calls whose arguments are plausible values
for that argument (so calls reach deep into the engine) with any number of them replaced by arbitrary
spreadsheet values: numbers (NaN, +-inf, 1e308, 1e-308, negatives), text, logicals, empty cells,
error values as other cells give them (Excel's codes, our own texts, the ``formulas`` library's error
tokens), ranges (2-D lists, 1-D lists, numpy arrays) of the wrong size or holding any of these,
probabilities outside [0, 1], weights not summing to one, unsorted and duplicated outcomes.

Each call must give a finite, correctly shaped result or the bridge's error value naming one of the
function's arguments (or ``model``/``arguments``/``result``), within a deadline: never an exception,
never the catch-all ``internal`` error (which would mean an unexpected failure inside), never a hang.

Settings are on the tests themselves (not a conftest profile), derandomized so CI runs the same cases
every time; the examples per function add up to more than 10,000 cases (see ``BUDGET``).
"""
from __future__ import annotations

import datetime as dt
import inspect
import math
import os
import signal
import threading
from contextlib import contextmanager

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from layerwise.addin import cells, handles
from layerwise.addin.functions import FUNCTIONS as F

try:  # the error tokens and empty-cell marker of headless recalculation
    import schedula
    from formulas.tokens.operand import Error as _FormulasError

    FORMULAS_ERRORS = list(_FormulasError.errors.values())
    EMPTY_TOKEN = [schedula.EMPTY]
except Exception:  # pragma: no cover - formulas is a dependency
    FORMULAS_ERRORS, EMPTY_TOKEN = [], []

# ----------------------------------------------------------------------------- budget
# examples per function: cheap builders and lookups get more, calibration and allocation fewer
HEAVY = {"LW_CALIBRATE", "LW_CALIBRATION", "LW_TARGET_TOWER", "LW_IMPLIED_PARAMETER", "LW_IMPLIED_SPREAD",
         "LW_ALLOCATE_LAYERS", "LW_ALLOCATE_UNITS", "LW_SENSITIVITY", "LW_PORTFOLIO", "LW_REINSTATEMENT_PREMIUM",
         "LW_REINSTATEMENT_TABLE"}
CHEAP = {"LW_CACHE_INFO", "LW_DISTORTION", "LW_DISTORTION_BLEND", "LW_DISTORTION_TABLE", "LW_DISTORTION_VALUE",
         "LW_FREQUENCY", "LW_SEVERITY", "LW_GROSS_PREMIUM", "LW_MODEL_YEARLOSS", "LW_MODEL_YEAREVENT",
         "LW_MODEL_SCENARIOS", "LW_MODEL_FREQSEV", "LW_MODEL_INFO"}


def budget(name: str) -> int:
    return 150 if name in HEAVY else 500 if name in CHEAP else 300


SCALE = float(os.environ.get("LAYERWISE_PROPERTY_SCALE", "1"))  # e.g. 10 for a longer local search
BUDGET = {name: max(1, int(budget(name) * SCALE)) for name in F}
DEADLINE_MS = 20_000  # per example; a hang is cut off by the watchdog below
WATCHDOG_S = 60


# ----------------------------------------------------------------------------- arbitrary cells
ERROR_TEXTS = [
    "#N/A", "#DIV/0!", "#VALUE!", "#REF!", "#NUM!", "#NAME?", "#NULL!", "#SPILL!", "#CALC!", "#GETTING_DATA",
    "#VALUE! LW_SEVERITY(param1): must lie in (0, inf], got -5",
    "#REF! LW_PREMIUM(model): year loss table yearloss#000000000000000000000000 is not in memory",
    "#NUM! LW_PREMIUM(result): is infinite",
]
SPECIAL_NUMBERS = [0.0, -0.0, 1.0, -1.0, 0.5, 2.0, 1e308, -1e308, 1e-308, 5e-324, -1e-308, math.inf, -math.inf,
                   math.nan, 1e6, 1e7, 1e9, 1e15, 0.99, 0.999999, 1.0000001, 2.0**22, 2.0**23, 16.0, 3.5]
WORDS = ["", " ", "unlimited", "inf", "-inf", "nan", "aggregate", "occurrence", "annual", "TRUE", "yes", "premium",
         "wang 0.4", "ph 0.8", "tvar 99%", "poisson 2", "lognormal 1e6 2", "freqsev(poisson 2, lognormal 1e6 1.5)",
         "yearloss#" + "0" * 24, "scenarios#" + "f" * 24, "distortion#" + "1" * 24, "blend(", "table(s=[0,1], g=[0,1])",
         "1e6", "5,000,000", "100%", "é", "\x00", "(" * 30, "wang " + "9" * 400, "lognormal 1e308 1e308"]

numbers = st.one_of(
    st.sampled_from(SPECIAL_NUMBERS),
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1e7, max_value=1e9),
    st.integers(min_value=-10**6, max_value=10**7),
    st.integers(min_value=-10**6, max_value=10**7).map(np.int64),
    st.floats(min_value=0, max_value=1e7).map(np.float64),
)
texts = st.one_of(st.sampled_from(WORDS), st.text(max_size=12))
errors = st.sampled_from(ERROR_TEXTS + FORMULAS_ERRORS)
scalars = st.one_of(
    numbers, numbers, texts, st.booleans(), st.none(), errors,
    st.sampled_from(EMPTY_TOKEN + [dt.date(2024, 1, 31), dt.datetime(2024, 1, 31, 12, 0)]),
)


def ranges(elements, max_side=5):
    rows_cols = st.tuples(st.integers(0, max_side), st.integers(0, max_side))
    rectangular = rows_cols.flatmap(lambda rc: st.lists(st.lists(elements, min_size=rc[1], max_size=rc[1]),
                                                        min_size=rc[0], max_size=rc[0]))
    ragged = st.lists(st.lists(elements, max_size=max_side), max_size=max_side)
    flat = st.lists(elements, max_size=max_side * 2)
    arrays = rows_cols.flatmap(lambda rc: st.lists(st.floats(allow_nan=True, allow_infinity=True),
                                                   min_size=rc[0] * rc[1], max_size=rc[0] * rc[1])
                               .map(lambda v, rc=rc: np.array(v, dtype=float).reshape(rc)))
    objects = rectangular.map(lambda rows: np.array(rows, dtype=object) if rows and rows[0] else np.empty((0, 0)))
    return st.one_of(rectangular, ragged, flat, arrays, objects)


any_cell = st.one_of(scalars, scalars, ranges(scalars))


# ----------------------------------------------------------------------------- plausible values per argument
def column(values):
    return [[v] for v in values]


def mix(valid, invalid):
    """Mostly valid values (seven in eight), so that calls get past the argument checks into the engine."""
    valid = valid if isinstance(valid, st.SearchStrategy) else st.sampled_from(valid)
    invalid = invalid if isinstance(invalid, st.SearchStrategy) else st.sampled_from(invalid)
    return st.sampled_from([False] * 7 + [True]).flatmap(lambda bad: invalid if bad else valid)


positive = st.sampled_from([1e5, 5e5, 1e6, 2e6, 3e6, 5e6, 1e7, 2.5e7])
EXTREME = [1e308, 1e300, 1e-300, 1e-308, 5e-324, 2.2e-308]  # magnitudes a float barely holds
amounts = mix(st.one_of(positive, st.sampled_from([0.0, 1e3, 1e8, 1e12]), st.floats(0, 5e7)), EXTREME)
limits = mix(st.one_of(positive, positive, st.sampled_from(["unlimited", "inf", 1e9, 1e-3]), st.floats(1.0, 5e7)), EXTREME)
probability = mix(st.one_of(st.sampled_from([0.0, 0.5, 0.9, 0.99, 0.996, 0.999]), st.floats(0, 1)), [1.0, 1.5, -0.1])


def tower(elements, n=st.integers(1, 5)):
    return n.flatmap(lambda k: st.lists(elements, min_size=k, max_size=k)).flatmap(
        lambda v: st.sampled_from([column(v), [v], v]))


def loss_sample(low=0.0):
    """Loss vectors: unsorted, with ties, of a few sizes; as a column, a row or a numpy array."""
    vals = st.lists(st.one_of(st.floats(low, 1e7), st.sampled_from([0.0, 1e6, 1e6, 2e6])), min_size=1, max_size=60)
    return vals.flatmap(lambda v: st.sampled_from([column(v), [v], np.array(v)[:, None], v]))


@st.composite
def scenario_args(draw):
    k = draw(st.integers(1, 12))
    outcomes = draw(st.lists(st.one_of(st.floats(0, 1e7), st.sampled_from([0.0, 1e6])), min_size=k, max_size=k))
    w = np.array(draw(st.lists(st.floats(0.0, 1.0), min_size=k, max_size=k)))
    how = draw(st.sampled_from(["normalised"] * 5 + ["raw", "off", "negative", "tiny_off"]))
    if how == "normalised" and w.sum() > 0:
        w = w / w.sum()
    elif how == "off":
        w = w * 1.1 + 0.01
    elif how == "negative":
        w[0] = -0.2
    elif how == "tiny_off" and w.sum() > 0:
        w = w / w.sum() * (1 + 1e-8)
    return column(outcomes), column(w.tolist())


@st.composite
def year_event_args(draw):
    k = draw(st.integers(1, 40))
    years = draw(st.lists(st.integers(1, 30), min_size=k, max_size=k))
    losses = draw(st.lists(st.floats(0, 5e6), min_size=k, max_size=k))
    return column([float(y) for y in years]), column(losses)


DISTORTIONS = ["wang 0.3", "ph 0.8", "tvar 0.99", "tvar 0", "dual 1.5", "ccoc 0.1", "wang(lam=0.4)",
               "proportional_hazard(r=0.5)", "blend(0.5*wang(lam=0.2), 0.5*tvar(p=0.9))",
               "table(s=[0, 0.5, 1], g=[0, 0.7, 1])", "wang -1", "ph 2", "tvar 1", "foo 1", "wang", "dual 0.5"]
SEVERITIES = ["lognormal 1e6 1.5", "pareto 0.8 1e6", "pareto 1.5 1e6", "gamma 1e6 0.5", "exponential 1e6",
              "weibull 0.7 1e6", "generalized_pareto 1.2 1e6", "single_pareto 1.5 1e5", "scipy.lomax(p1=2, scale=1e6)",
              "invweibull(c=0.5)", "lognormal 5", "norm 1 2", "lognormal(mean=1e308, cv=1e308)"]
FREQUENCIES = ["poisson 2", "negative binomial 5 0.6", "binomial 10 0.1", "fixed 3", "poisson(mean=1e7)",
               "poisson -1", "geometric 2", "fixed 2.5", "poisson 1e-300", "fixed 10000000"]
FAMILIES = ["lognormal", "gamma", "pareto", "single_pareto", "weibull", "exponential", "generalized_pareto", "lomax",
            "invweibull", "genpareto", "burr12", "norm", "poisson", "negative_binomial", "binomial", "fixed", "wang",
            "ph", "proportional_hazard", "dual_power", "tvar", "cost_of_capital", "ccoc", "blend", "table", "nope"]

GOOD_DISTORTIONS = DISTORTIONS[:10]
BAD_DISTORTIONS = DISTORTIONS[10:]
POOLS = {
    "attachment": amounts, "attachments": st.one_of(amounts, tower(amounts)),
    "limit": limits, "limits": mix(tower(positive), tower(limits)), "breaks": st.one_of(st.none(), tower(positive)),
    "share": mix([None, 1.0, 0.5, 0.25], [0.0, 1.5, -0.1, 1e-308, 5e-324]),
    "shares": mix(st.one_of(st.sampled_from([None, 0.5, 1.0]), tower(st.sampled_from([0.5, 1.0, 0.1]))), [0.0, 2.0]),
    "basis": mix([None, None, "occurrence", "aggregate", "Annual", "per event"], ["monthly"]),
    "reinstatements": mix([None, None, 0.0, 1.0, 2.0, "unlimited"], [1.5, -1.0]),
    "agg_deductible": mix([None, None, 0.0, 1e6], [-5.0, 1e-308, 1e308]),
    "agg_deductibles": mix(st.one_of(st.sampled_from([None, 0.0, 1e6]), tower(st.sampled_from([0.0, 5e5]))), [-1.0]),
    "distortion": mix(GOOD_DISTORTIONS, st.one_of(st.sampled_from(BAD_DISTORTIONS), tower(st.sampled_from(DISTORTIONS[:6]), st.integers(1, 3)))),
    "distortions": tower(mix(GOOD_DISTORTIONS, BAD_DISTORTIONS), st.integers(1, 4)),
    "statistic": mix(["expected_loss", "std", "cv", "prob_attach", "prob_exhaust", "var", "tvar"], ["kurtosis"]),
    "level": probability,
    "param1": mix([1e6, 2e6, 1.5, 2.0, 0.8, 5.0, 10.0, 0.3], numbers), "param2": mix([1e6, 1.5, 0.5, 2.0, 0.1, 0.6, None], numbers),
    "param3": mix([None], numbers), "param4": mix([None], numbers),
    "value": st.one_of(probability, numbers),
    "s": st.one_of(probability, st.just(column([0.0, 0.5, 1.0])), st.just([[0.0, 0.2, 0.5, 1.0]])),
    "g": st.one_of(st.just(column([0.0, 0.7, 1.0])), st.just(column([0.0, 0.2, 1.0])), st.just(column([0.0, 1.0]))),
    "require_concave": mix([None, True, False, "FALSE", 1.0], ["maybe"]),
    "weights": st.one_of(st.none(), loss_sample(), tower(probability, st.integers(1, 4))),
    "frequency": mix(FREQUENCIES[:5], FREQUENCIES[5:]), "severity": mix(SEVERITIES[:10], SEVERITIES[10:]),
    "bucket": mix([None, None, 1e4, 1e5, 2.5e5], [1e-300, 1e308, -1.0, 0.0]),
    "grid_length": mix([None, None, 16.0, 1024.0, 4096.0], [1000.0, 2.0**23, 0.5]),
    "method": mix([None, "moment", "rounding"], ["spline"]),
    "losses": loss_sample(), "n_years": mix([None, 30.0, 50.0], [5.0, 0.0, 2.5]),
    "columns": mix([None, None, "premium", "premium, rate_on_line", column(["premium", "std"])], ["profit"]),
    "standard": mix(["var", "tvar", "tvar", "amount"], [None, "solvency"]),
    "target_return": mix([0.1, 0.15, 0.0], [-1.0, 5.0, 1e6]),
    "quantity": st.sampled_from([None, "premium", "capital", "assets", "upfront", "total", "grid_error", "nope"]),
    "price": mix(positive, [0.0, -1.0, 1e12]), "quote": mix([None, "premium", "rate_on_line"], ["roll"]),
    "market_layer": mix([1.0, 2.0], [0.0, 9.0, 1.5]),
    "measure": mix([None, "premium", "rate_on_line", "loss_ratio"], ["nope"]),
    "rates": st.one_of(st.none(), tower(mix([1.0, 0.5, 0.0], [-1.0]), st.integers(1, 3))),
    "technical": st.one_of(amounts, tower(amounts)),
    "brokerage": mix([None, 0.1, 0.0], [0.99, 1.0]), "expenses": mix([None, 0.05], [0.5, -0.1]),
    "names": st.sampled_from([None, "a, b", column(["a", "b"])]),
}
DISTORTION_FAMILIES = ["wang", "ph", "proportional_hazard", "dual_power", "tvar", "cost_of_capital", "ccoc"]
SEVERITY_FAMILIES = FAMILIES[:12]
FREQUENCY_FAMILIES = ["poisson", "negative_binomial", "binomial", "fixed"]
FAMILY_BY_FUNCTION = {
    "LW_SEVERITY": mix(SEVERITY_FAMILIES, FAMILIES), "LW_FREQUENCY": mix(FREQUENCY_FAMILIES, FAMILIES),
    "LW_DISTORTION": mix(DISTORTION_FAMILIES + ["wang 0.4", "ph 0.8"], FAMILIES),
}
POOLS["family"] = mix(DISTORTION_FAMILIES, FAMILIES)  # calibration and implied parameters search distortion families
POOLS["families"] = mix(st.one_of(st.none(), st.sampled_from(["ph, wang", "tvar"]),
                                  tower(st.sampled_from(DISTORTION_FAMILIES), st.integers(1, 3))), ["nope", "blend"])
LAYER_TOWER_LIMIT = 6  # rows per generated tower: cheap enough for hundreds of examples


@pytest.fixture(scope="module")
def models():
    """References every pricing function is tried on (built once; data models rebuilt if evicted)."""
    rng = np.random.default_rng(2024)
    ylt = F["LW_MODEL_YEARLOSS"](column(rng.lognormal(13.5, 1.2, 400).tolist()))
    years = rng.integers(1, 101, 300).astype(float)
    yet = F["LW_MODEL_YEAREVENT"](column(years.tolist()), column((rng.pareto(1.6, 300) * 5e5).tolist()), 100.0)
    scen = F["LW_MODEL_SCENARIOS"](column([0.0, 1e6, 4e6, 1.2e7, 3e7]), column([0.55, 0.25, 0.12, 0.06, 0.02]))
    refs = [
        F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5"),
        F["LW_MODEL_FREQSEV"]("negative binomial 3 0.8", "pareto 1.5 1e6"),
        F["LW_MODEL_FREQSEV"]("poisson 1", "pareto 0.8 1e6"),  # infinite mean
        F["LW_MODEL_FREQSEV"]("fixed 1", "gamma 1e6 0.5", 1e5),  # a fixed bucket: layers must fit it
        F["LW_MODEL_FREQSEV"]("poisson 20000", "exponential 1e3"),  # more claims than a per-occurrence grid holds well
        ylt, yet, scen,
    ]
    for r in refs:
        assert not cells.is_error_value(r), r
    return refs + ["freqsev(poisson 2, exponential 1e6)", "freqsev(poisson 2, lognormal 1e6 1e-10)",
                   "freqsev(poisson 2, lognormal 1e6 1.5, bucket=1e308)", "yearloss#" + "0" * 24, "not a model"]


def plausible(name: str, models, function: str = ""):
    if name == "family" and function in FAMILY_BY_FUNCTION:
        return FAMILY_BY_FUNCTION[function]
    if name in ("model",):
        return st.sampled_from(models)
    if name == "units":
        return st.one_of(st.just(column(models[:2])), st.just([models[4:6]]), loss_sample())
    if name in ("outcomes", "probabilities", "years"):
        return st.nothing()  # drawn together below
    return POOLS.get(name, any_cell)


@st.composite
def calls(draw, name, models):
    params = list(inspect.signature(F[name]).parameters.values())
    args = {}
    if {"outcomes", "probabilities"} <= {p.name for p in params}:
        args["outcomes"], args["probabilities"] = draw(scenario_args())
    if {"years", "losses"} <= {p.name for p in params}:
        args["years"], args["losses"] = draw(year_event_args())
    if name == "LW_DISTORTION_BLEND":
        k = draw(st.integers(1, 4))
        args["distortions"] = column(draw(st.lists(mix(GOOD_DISTORTIONS, BAD_DISTORTIONS), min_size=k, max_size=k)))
        w = np.array(draw(st.lists(st.floats(0.0, 1.0), min_size=k, max_size=k))) + 1e-3
        args["weights"] = column((w / w.sum()).tolist() if draw(mix([True], [False])) else w.tolist())
    if name == "LW_DISTORTION_TABLE":
        x = sorted(draw(st.lists(st.floats(0.01, 0.99), min_size=0, max_size=4, unique=True)))
        y = sorted(draw(st.lists(st.floats(0.0, 1.0), min_size=len(x), max_size=len(x))))
        if draw(mix([True], [False])):  # concave: through (0,0), (x, g) with g >= the chord, (1, 1)
            y = [min(1.0, xi ** 0.5) for xi in x]
        args["s"], args["g"] = column([0.0] + x + [1.0]), column([0.0] + y + [1.0])
    for p in params:
        if p.name not in args:
            args[p.name] = draw(plausible(p.name, models, name), label=p.name)
    values = [args[p.name] for p in params]
    # replace some of them with arbitrary cells: none (a plausible call), each with chance 1/8, or all (noise)
    mode = draw(st.sampled_from(["plausible", "plausible", "plausible", "some", "some", "noise"]))
    if mode != "plausible":
        hit = [True] * len(values) if mode == "noise" else draw(
            st.lists(st.sampled_from([False] * 7 + [True]), min_size=len(values), max_size=len(values)))
        for i, h in enumerate(hit):
            if h:
                values[i] = draw(any_cell, label=f"arbitrary {params[i].name}")
    # trailing optional arguments may be omitted, or one too many given
    required = sum(1 for p in params if p.default is p.empty)
    n = draw(st.sampled_from([len(values)] * 12 + [max(required, len(values) - 1), required, len(values) + 1]))
    values = (values + [1.0])[:n]
    return values


# ----------------------------------------------------------------------------- the property
ALLOWED_EXTRA = {"model", "arguments", "result"}


def check(name: str, args, out):
    params = set(inspect.signature(F[name]).parameters)
    if isinstance(out, str):
        info = cells.parse_error(out)
        if info is None:
            return  # a reference or a text result
        assert info.function == name, (name, args, out)
        assert info.argument != "internal", f"unexpected failure inside {name}{tuple(args)!r}: {out}"
        assert info.argument in params | ALLOWED_EXTRA, (name, args, out)
        assert info.message, (name, args, out)
        assert "\n" not in out
        if "error from another cell" in info.message:  # passed on with the code it arrived with
            assert any(info.message.endswith(str(e)) or str(e) in info.message for e in _errors_in(args)), (name, args, out)
            assert any(cells.parse_error(str(e)).code == info.code for e in _errors_in(args)), (name, args, out)
        return
    if isinstance(out, bool):
        return
    if isinstance(out, float):
        assert math.isfinite(out), (name, args, out)
        return
    assert isinstance(out, list) and out, (name, args, out)
    width = len(out[0]) if isinstance(out[0], list) else None
    for row in out:
        assert isinstance(row, list) and len(row) == width, (name, args, out)  # rectangular
        for v in row:
            assert isinstance(v, (str, bool)) or (isinstance(v, float) and math.isfinite(v)), (name, args, v)
            if isinstance(v, str) and cells.is_error_value(v):
                assert cells.parse_error(v).argument != "internal", (name, args, v)


def _errors_in(args):
    out = []
    for a in args:
        flat = cells.grid(a)[2] if isinstance(a, (list, tuple, np.ndarray)) else [a]
        out.extend(v for v in flat if isinstance(v, str) and cells.is_error_value(v))
    return out


def check_reference(name: str, out):
    """What a builder returns must work where it is used."""
    if not isinstance(out, str) or cells.is_error_value(out):
        return
    if name.startswith("LW_MODEL_") and name != "LW_MODEL_INFO":
        handles.resolve_model(out)
    elif name.startswith("LW_DISTORTION") and name != "LW_DISTORTION_VALUE":
        handles.parse_distortion(out)
    elif name == "LW_SEVERITY":
        handles.parse_severity(out)
    elif name == "LW_FREQUENCY":
        handles.parse_frequency(out)


@contextmanager
def watchdog(seconds: int, what: str):
    """Fail (instead of hanging the run) when one call takes longer than ``seconds``."""
    if threading.current_thread() is not threading.main_thread() or not hasattr(signal, "SIGALRM"):
        yield
        return

    def fire(signum, frame):
        raise TimeoutError(f"{what} took more than {seconds} s")

    old = signal.signal(signal.SIGALRM, fire)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


COUNTS: dict[str, int] = {}


@pytest.mark.parametrize("name", sorted(F))
def test_no_input_takes_a_function_down(name, models):
    @settings(max_examples=BUDGET[name], deadline=DEADLINE_MS, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck), print_blob=True)
    @given(args=calls(name, models))
    def run(args):
        COUNTS[name] = COUNTS.get(name, 0) + 1
        with watchdog(WATCHDOG_S, name):
            out = F[name](*args)
        check(name, args, out)
        check_reference(name, out)

    run()


def test_budget_is_at_least_ten_thousand_cases():
    assert sum(budget(name) for name in F) >= 10_000, BUDGET  # the default run (SCALE 1)


# ----------------------------------------------------------------------------- cases that once failed
# (found by generated or fuzzed calls; each was an exception inside, reported as the internal error)
REGRESSIONS = [
    ("LW_PREMIUM", ("freqsev(poisson 2, lognormal 1e6 1.5)", 1e-308, 5e-324, "ph 0.5")),  # bucket 0: division by zero
    ("LW_PREMIUM", ("freqsev(poisson 2, lognormal 1e6 1.5)", 0.0, 1e308, "wang 0.3")),  # grid top overflowed to inf
    ("LW_PREMIUM", ("freqsev(poisson 2, lognormal 1e6 1.5, bucket=1e308)", 0.0, 1e6, "wang 0.3", None, "aggregate")),
    ("LW_PREMIUM", ("freqsev(poisson 1e7, lognormal 1e6 1.5)", 0.0, 1e6, "wang 0.3")),  # every year beyond the grid
    ("LW_PREMIUM", ("freqsev(fixed 10000000, exponential 1)", 0.0, 1.0, "ph 0.5")),
    ("LW_EXPECTED_LOSS", ("freqsev(fixed(n=1), exponential(mean=1))", 1e300, "unlimited", 0.5, None, None, 1e-308)),
    ("LW_REINSTATEMENT_PREMIUM", ("freqsev(poisson 2, lognormal 1e6 1.5)", 3.0, 1e6, "ph 0.8", 1.0, 1e-308, None)),
    ("LW_RATE_ON_LINE", ("freqsev(poisson 2, lognormal 1e6 1.5)", 0.0, 1e6, "ph 0.8", 1e-308)),
    ("LW_SEVERITY", ("invweibull", 0.5)),  # a valid family with a NaN mean in scipy was refused
    ("LW_PREMIUM", ("freqsev(poisson 2, invweibull(c=0.5, scale=1e6))", 0.0, "unlimited", "ph 0.8")),
    ("LW_PREMIUM", ("freqsev(poisson 2, invweibull(c=1.5, scale=1e6))", 0.0, 1e6, "ph 0.8")),  # scipy's variance < 0
]


@pytest.mark.parametrize("name, args", REGRESSIONS, ids=[f"{n}-{i}" for i, (n, _) in enumerate(REGRESSIONS)])
def test_cases_that_once_failed(name, args):
    with watchdog(WATCHDOG_S, name):
        out = F[name](*args)
    check(name, list(args), out)
    check_reference(name, out)
