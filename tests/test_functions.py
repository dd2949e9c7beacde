"""The published LW_ functions: xlwings metadata, Excel's limits, results equal to direct engine calls,
and bad input turned into error values that name the argument."""
from __future__ import annotations

import keyword
import math
import re
import sys

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

import layerwise.engine as lw
from layerwise.addin import cells, functions, handles
from layerwise.addin.functions import FUNCTIONS, describe_functions

F = FUNCTIONS

# VBA keywords and statement names that cannot be used as argument names in the generated wrappers.
VBA_RESERVED = {
    "and", "as", "boolean", "byref", "byte", "byval", "call", "case", "close", "const", "date", "declare", "dim",
    "do", "double", "each", "else", "elseif", "end", "enum", "eqv", "erase", "error", "event", "exit", "false",
    "for", "friend", "function", "get", "global", "gosub", "goto", "if", "imp", "implements", "in", "input",
    "integer", "is", "let", "like", "lock", "long", "loop", "lset", "me", "mod", "name", "new", "next", "not",
    "nothing", "on", "open", "option", "optional", "or", "paramarray", "preserve", "print", "private", "property",
    "public", "put", "raiseevent", "redim", "rem", "resume", "return", "rset", "seek", "select", "set", "single",
    "static", "step", "stop", "string", "sub", "then", "to", "true", "type", "typeof", "unlock", "until",
    "variant", "wend", "while", "with", "withevents", "write", "xor", "array", "empty", "null", "caller",
}
VBA_IDENTIFIER = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
A1_REFERENCE = re.compile(r"^[A-Za-z]{1,3}[0-9]+$")
TABLES = {"LW_TOWER", "LW_MODEL_INFO", "LW_CACHE_INFO", "LW_DISTORTION_VALUE"}


# =========================================================================== fixtures
@pytest.fixture(scope="module")
def fs():
    """A small frequency-severity model: its reference and the same model built directly."""
    ref = F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5")
    model = lw.FrequencySeverity(lw.poisson(2), lw.lognormal(1e6, 1.5))
    return ref, model


@pytest.fixture(scope="module")
def annual_losses():
    return np.random.default_rng(7).lognormal(14.5, 1.1, 2000)


@pytest.fixture(scope="module")
def ylt(annual_losses):
    ref = F["LW_MODEL_YEARLOSS"]([[float(x)] for x in annual_losses])
    return ref, lw.YearLossTable(annual_losses)


@pytest.fixture(scope="module")
def yet():
    rng = np.random.default_rng(11)
    years = rng.integers(1, 501, 1500).astype(float)
    losses = rng.pareto(1.8, 1500) * 1e6
    ref = F["LW_MODEL_YEAREVENT"]([[y] for y in years], [[x] for x in losses], 500.0)
    return ref, lw.YearEventTable(years, losses, 500), years, losses


@pytest.fixture(scope="module")
def scen():
    outcomes = [0.0, 1e6, 4e6, 1.2e7, 3e7]
    probs = [0.55, 0.25, 0.12, 0.06, 0.02]
    ref = F["LW_MODEL_SCENARIOS"]([[x] for x in outcomes], [[p] for p in probs])
    return ref, lw.ScenarioTable(outcomes, probs), np.array(outcomes), np.array(probs)


def engine_row(model, layer, g):
    return lw.price_layers(model, [layer], g).iloc[0]


def same(got, want, name=""):
    """A cell result equals the engine's number; NaN and inf must come back as #NUM! error values."""
    if not math.isfinite(want):
        info = cells.parse_error(got)
        assert info is not None and info.code == "#NUM!" and info.function == name, (name, got, want)
    else:
        assert isinstance(got, float) and got == pytest.approx(want, rel=1e-12), (name, got, want)


# =========================================================================== metadata and Excel's limits
def test_every_published_function_carries_xlwings_metadata():
    assert len(F) >= 20
    for name, f in F.items():
        meta = f.__xlfunc__
        assert meta["name"] == name
        assert getattr(sys.modules[f.__module__], name) is f  # defined in a bridge module under its own name
        assert getattr(f, "__cell_function__", False), f"{name} is not wrapped by cell_function"
        assert meta["category"] == functions.CATEGORY
        assert meta["sub"] is False
        assert meta["volatile"] is (name == "LW_CACHE_INFO")
        expand = meta["ret"]["options"].get("expand")
        if f.__module__ == functions.__name__:  # other bridge modules check their own tables
            assert (expand == "table") == (name in TABLES), name


def test_names_are_short_valid_vba_identifiers():
    lowered = [n.lower() for n in F]
    assert len(set(lowered)) == len(lowered)  # Excel is case-insensitive
    for name in F:
        assert VBA_IDENTIFIER.match(name) and len(name) <= 32, name
        assert name.startswith("LW_") and name.isupper()
        assert not A1_REFERENCE.match(name)


def test_descriptions_and_argument_help_fit_excel():
    for d in describe_functions():
        desc = d["description"]
        assert desc and "\n" not in desc and len(desc) <= 255, d["name"]
        assert len(d["args"]) <= 30
        seen_optional = False
        for a in d["args"]:
            assert VBA_IDENTIFIER.match(a["name"]) and len(a["name"]) <= 255
            assert a["name"].lower() not in VBA_RESERVED and not keyword.iskeyword(a["name"]), (d["name"], a["name"])
            help_text = a["help"]
            assert help_text and not help_text.startswith("Positional argument"), (d["name"], a["name"])
            assert "\n" not in help_text and len(help_text) <= 255, (d["name"], a["name"], len(help_text))
            if a["optional"]:
                seen_optional = True
                assert a["default"] is None  # an empty cell and an omitted argument mean the same
            else:
                assert not seen_optional, "required argument after an optional one"


def test_arguments_read_error_cells_as_text():
    for name, f in F.items():
        for a in f.__xlfunc__["args"]:
            assert a["options"].get("err_to_str") is True, (name, a["name"])


def test_shims_call_xlwings_decorators(monkeypatch):
    calls = []

    class FakeXw:
        @staticmethod
        def func(**kw):
            calls.append(("func", kw))
            return lambda f: f

        @staticmethod
        def arg(name, **kw):
            calls.append(("arg", name, kw))
            return lambda f: f

        @staticmethod
        def ret(**kw):
            calls.append(("ret", kw))
            return lambda f: f

    monkeypatch.setattr(functions, "xw", FakeXw)

    @functions.xl_func(category="layerwise", volatile=False)
    @functions.xl_arg("x", doc="the x")
    @functions.xl_ret(expand="table")
    def LW_PROBE(x, y=None):
        """Probe."""

    assert [c[0] for c in calls] == ["ret", "arg", "func"]
    assert calls[1] == ("arg", "x", {"doc": "the x"})
    if not functions._NATIVE:
        meta = LW_PROBE.__xlfunc__
        assert meta["args"][0]["doc"] == "the x" and meta["args"][1]["optional"] is None
        assert meta["ret"]["options"] == {"expand": "table"} and meta["ret"]["doc"] == "Probe."


def test_describe_functions_lists_every_function():
    listed = {d["name"]: d for d in describe_functions()}
    assert set(listed) == set(F)
    assert [a["name"] for a in listed["LW_PREMIUM"]["args"]][:4] == ["model", "attachment", "limit", "distortion"]
    assert listed["LW_TOWER"]["returns"] == "table" and listed["LW_PREMIUM"]["returns"] == "value"


# =========================================================================== builders
def test_severity_and_frequency_references_rebuild_the_engine_objects():
    ref = F["LW_SEVERITY"]("lognormal", 2e6, 2.5)
    assert handles.parse_severity(ref) == lw.make_severity("lognormal", 2e6, 2.5)
    assert handles.parse_severity(F["LW_SEVERITY"]("Pareto", 1.5, 1e6)) == lw.pareto(1.5, 1e6)
    assert handles.parse_severity(F["LW_SEVERITY"]("gamma", 5.0, 0.5)) == lw.gamma(mean=5.0, cv=0.5)
    lomax = handles.parse_severity(F["LW_SEVERITY"]("lomax", 2.0, 0.0, 3.0))
    assert lomax.sf(4.0) == pytest.approx(stats.lomax(2.0, 0.0, 3.0).sf(4.0), rel=1e-14)
    assert handles.parse_frequency(F["LW_FREQUENCY"]("poisson", 5.0)) == lw.poisson(5)
    nb = handles.parse_frequency(F["LW_FREQUENCY"]("negative binomial", 5.0, 0.6))
    assert nb == lw.negative_binomial(5.0, 0.6)
    assert handles.parse_frequency(F["LW_FREQUENCY"]("binomial", 10.0, 0.1)) == lw.binomial(10, 0.1)
    assert handles.parse_frequency(F["LW_FREQUENCY"]("fixed", 3.0)) == lw.fixed_count(3)


def test_distortion_builders_equal_engine_distortions():
    s = np.linspace(0.0, 1.0, 101)
    assert handles.parse_distortion(F["LW_DISTORTION"]("wang", 0.4)) == lw.WangTransform(0.4)
    assert handles.parse_distortion(F["LW_DISTORTION"]("PH", 0.8)) == lw.ProportionalHazard(0.8)
    assert handles.parse_distortion(F["LW_DISTORTION"]("tvar 99%")) == lw.TVaRDistortion(0.99)
    blend = F["LW_DISTORTION_BLEND"]([["wang 0.4"], ["tvar(p=0.9)"]], [[0.3], [0.7]])
    want = lw.Blend((lw.WangTransform(0.4), lw.TVaRDistortion(0.9)), (0.3, 0.7))
    np.testing.assert_allclose(handles.parse_distortion(blend)(s), want(s), rtol=0, atol=1e-15)
    table = F["LW_DISTORTION_TABLE"]([[0.0], [0.1], [0.4], [1.0]], [[0.0], [0.3], [0.7], [1.0]])
    np.testing.assert_allclose(handles.parse_distortion(table)(s), np.interp(s, [0, 0.1, 0.4, 1], [0, 0.3, 0.7, 1]))
    loose = F["LW_DISTORTION_TABLE"]([0.0, 0.5, 1.0], [0.0, 0.2, 1.0], False)
    assert handles.parse_distortion(loose) == lw.TableDistortion((0, 0.5, 1), (0, 0.2, 1), require_concave=False)


def test_distortion_value_matches_scipy():
    lam = 0.35
    s = [[0.01, 0.1], [0.5, 0.9]]
    got = F["LW_DISTORTION_VALUE"]("wang 0.35", s)
    want = stats.norm.cdf(stats.norm.ppf(np.array(s)) + lam)
    np.testing.assert_allclose(np.array(got), want, rtol=1e-12)
    assert F["LW_DISTORTION_VALUE"]("ph 0.5", 0.25) == pytest.approx(0.5, rel=1e-15)
    assert F["LW_DISTORTION_VALUE"]("tvar 0.8", [[0.1]]) == pytest.approx(0.5)
    assert np.array(F["LW_DISTORTION_VALUE"]("dual 2", [0.1, 0.3])).shape == (2, 1)  # a 1-D list is a column


def test_model_builders_accept_all_range_shapes(annual_losses):
    x = annual_losses[:50]
    column = [[float(v)] for v in x]
    refs = {
        F["LW_MODEL_YEARLOSS"](column),
        F["LW_MODEL_YEARLOSS"]([list(map(float, x))]),  # one row
        F["LW_MODEL_YEARLOSS"](list(map(float, x))),  # xlwings' 1-D list
        F["LW_MODEL_YEARLOSS"](np.array(column)),  # headless numpy range
        F["LW_MODEL_YEARLOSS"](column + [[None], [None]]),  # trailing empty cells
        F["LW_MODEL_YEARLOSS"](np.array(column + [[None]], dtype=object)),
    }
    assert len(refs) == 1
    ref = refs.pop()
    assert ref.startswith("yearloss#")
    with handles.model_in_use(ref) as (_, m):
        assert m == lw.YearLossTable(x)


# =========================================================================== prices equal the engine's
LAYER_FUNCTIONS = {
    "LW_PREMIUM": "premium", "LW_MARGIN": "margin", "LW_LOSS_RATIO": "loss_ratio", "LW_RATE_ON_LINE": "rate_on_line",
    "LW_CAPITAL": "capital", "LW_RETURN_ON_CAPITAL": "return_on_capital",
}


@pytest.mark.parametrize("terms", [
    dict(a=1e6, l=4e6),
    dict(a=1e6, l=4e6, share=0.4),
    dict(a=2e6, l=3e6, share=0.25, rein=1.0),
    dict(a=5e5, l=2e6, rein=2.0, aad=1e6),
])
def test_frequency_severity_prices_equal_engine(fs, terms):
    ref, model = fs
    share, rein, aad = terms.get("share"), terms.get("rein"), terms.get("aad")
    layer = lw.Layer.occurrence(terms["a"], terms["l"], reinstatements=None if rein is None else int(rein),
                                agg_deductible=aad or 0.0, share=share or 1.0)
    g = lw.WangTransform(0.4)
    row = engine_row(model, layer, g)
    for name, col in LAYER_FUNCTIONS.items():
        got = F[name](ref, terms["a"], terms["l"], "wang(lam=0.4)", share, None, rein, aad)
        same(got, row[col], name)
    assert F["LW_EXPECTED_LOSS"](ref, terms["a"], terms["l"], share, None, rein, aad) == pytest.approx(row["expected_loss"], rel=1e-12)


def test_aggregate_basis_on_frequency_severity(fs):
    ref, model = fs
    row = engine_row(model, lw.Layer.aggregate(2e6, 5e6, share=0.5), lw.DualPower(1.8))
    assert F["LW_PREMIUM"](ref, 2e6, 5e6, "dual_power(m=1.8)", 0.5, "aggregate") == pytest.approx(row["premium"], rel=1e-12)
    assert F["LW_PREMIUM"](ref, 2e6, 5e6, "dual power 1.8", [[0.5]], "Annual") == pytest.approx(row["premium"], rel=1e-12)


def test_unlimited_layer_and_typed_model(fs):
    ref, model = fs
    row = engine_row(model, lw.Layer.occurrence(0.0, math.inf), lw.ProportionalHazard(0.9))
    assert F["LW_PREMIUM"]("freqsev(poisson 2, lognormal 1e6 1.5)", 0.0, "unlimited", "ph 0.9") == pytest.approx(row["premium"], rel=1e-12)
    # an unlimited layer needs unbounded capital: a #NUM! error value, not a number
    info = cells.parse_error(F["LW_CAPITAL"](ref, 0.0, "unlimited", "ph 0.9"))
    assert info.code == "#NUM!" and info.function == "LW_CAPITAL"


def test_year_loss_table_defaults_to_the_annual_total(ylt, annual_losses):
    ref, model = ylt
    g = lw.CostOfCapital(0.1)
    row = engine_row(model, lw.Layer.aggregate(2e6, 5e6), g)
    assert F["LW_PREMIUM"](ref, 2e6, 5e6, "cost_of_capital(roe=0.1)") == pytest.approx(row["premium"], rel=1e-12)
    # outside check: the expected loss of a stop-loss layer on equally likely years
    el = np.mean(np.clip(annual_losses - 2e6, 0.0, 5e6))
    assert F["LW_EXPECTED_LOSS"](ref, 2e6, 5e6) == pytest.approx(el, rel=1e-12)
    # the cost-of-capital distortion earns exactly its return on capital
    assert F["LW_RETURN_ON_CAPITAL"](ref, 2e6, 5e6, "ccoc 0.1") == pytest.approx(0.1, rel=1e-9)


def test_weighted_year_loss_table(annual_losses):
    x = annual_losses[:200]
    w = np.arange(1, 201, dtype=float)
    ref = F["LW_MODEL_YEARLOSS"]([[v] for v in x], [[v] for v in w])
    el = np.sum(w * np.clip(x - 1e6, 0, 2e6)) / w.sum()
    assert F["LW_EXPECTED_LOSS"](ref, 1e6, 2e6) == pytest.approx(el, rel=1e-12)
    row = engine_row(lw.YearLossTable(x, w), lw.Layer.aggregate(1e6, 2e6), lw.WangTransform(0.2))
    assert F["LW_PREMIUM"](ref, 1e6, 2e6, "wang 0.2") == pytest.approx(row["premium"], rel=1e-12)


def test_year_event_table_defaults_to_per_occurrence(yet):
    ref, model, years, losses = yet
    g = lw.WangTransform(0.3)
    row = engine_row(model, lw.Layer.occurrence(1e6, 2e6, reinstatements=1), g)
    assert F["LW_PREMIUM"](ref, 1e6, 2e6, "wang 0.3", None, None, 1.0) == pytest.approx(row["premium"], rel=1e-12)
    # outside check: per-event payments summed by year, one reinstatement caps the year at 2 limits
    pay = np.clip(losses - 1e6, 0, 2e6)
    annual = np.minimum(np.bincount(years.astype(int) - 1, weights=pay, minlength=500), 4e6)
    assert F["LW_EXPECTED_LOSS"](ref, 1e6, 2e6, None, None, 1.0) == pytest.approx(annual.mean(), rel=1e-12)
    agg = engine_row(model, lw.Layer.aggregate(1e6, 2e6), g)
    assert F["LW_PREMIUM"](ref, 1e6, 2e6, "wang 0.3", None, "aggregate") == pytest.approx(agg["premium"], rel=1e-12)


def test_scenario_table_prices(scen):
    ref, model, x, p = scen
    # outside check: TVaR at 90% of a discrete distribution by hand
    order = np.argsort(-x)
    xs, ps = x[order], p[order]
    cum = np.cumsum(ps)
    take = np.minimum(ps, np.maximum(0.1 - (cum - ps), 0.0))
    tvar = float(np.sum(take * xs) / 0.1)
    assert F["LW_PREMIUM"](ref, 0.0, "unlimited", "tvar 0.9") == pytest.approx(tvar, rel=1e-12)
    row = engine_row(model, lw.Layer.aggregate(1e6, 1e7), lw.DualPower(2))
    assert F["LW_LOSS_RATIO"](ref, 1e6, 1e7, "dual 2") == pytest.approx(row["loss_ratio"], rel=1e-12)


@pytest.mark.parametrize("stat", ["expected_loss", "std", "cv", "prob_attach", "prob_exhaust"])
def test_layer_statistics_equal_engine(fs, stat):
    ref, model = fs
    row = engine_row(model, lw.Layer.occurrence(1e6, 3e6, reinstatements=2, share=0.5), lw.WangTransform(0.0))
    assert F["LW_LAYER_STAT"](ref, 1e6, 3e6, stat, None, 0.5, None, 2.0) == pytest.approx(row[stat], rel=1e-12)


@pytest.mark.parametrize("stat", ["var", "tvar"])
def test_layer_var_tvar_equal_engine(ylt, annual_losses, stat):
    ref, model = ylt
    row = lw.layer_statistics(model, [lw.Layer.aggregate(1e6, 8e6)], [0.95]).iloc[0]
    assert F["LW_LAYER_STAT"](ref, 1e6, 8e6, stat, 0.95) == pytest.approx(row[f"{stat}_0.95"], rel=1e-12)
    if stat == "var":  # outside check: lower empirical quantile of the layer loss
        layer_loss = np.sort(np.clip(annual_losses - 1e6, 0, 8e6))
        k = math.ceil(0.95 * layer_loss.size) - 1
        assert F["LW_LAYER_STAT"](ref, 1e6, 8e6, "VaR", 0.95) == pytest.approx(layer_loss[k], rel=1e-12)


# =========================================================================== tables
def test_tower_equals_engine_and_has_a_header(fs):
    ref, model = fs
    limits = [1e6, 2e6, 5e6]
    table = F["LW_TOWER"](ref, 5e5, [[v] for v in limits], "wang 0.4", None, None, [[1.0], [1.0], [None]])
    layers = [lw.Layer.occurrence(5e5, 1e6, reinstatements=1), lw.Layer.occurrence(1.5e6, 2e6, reinstatements=1),
              lw.Layer.occurrence(3.5e6, 5e6)]
    frame = lw.price_layers(model, layers, lw.WangTransform(0.4))
    assert table[0] == list(frame.columns)
    assert len(table) == 1 + len(limits)
    for row, (_, want) in zip(table[1:], frame.iterrows()):
        for col, got in zip(table[0], row):
            w = want[col]
            if isinstance(w, str):
                assert got == w
            elif math.isinf(w):
                assert got == "unlimited"
            elif math.isnan(w):
                assert got == "#N/A"
            else:
                assert got == pytest.approx(w, rel=1e-12), col


def test_tower_columns_attachments_and_several_distortions(ylt):
    ref, model = ylt
    table = F["LW_TOWER"](ref, [[0.0], [3e6]], [[3e6], ["unlimited"]], [["wang 0.2"], ["ph 0.7"]], 0.5, None, None,
                          None, "premium, expected_loss")
    layers = [lw.Layer.aggregate(0.0, 3e6, share=0.5), lw.Layer.aggregate(3e6, math.inf, share=0.5)]
    frame = lw.price_layers(model, layers, {"wang 0.2": lw.WangTransform(0.2), "ph 0.7": lw.ProportionalHazard(0.7)})
    assert table[0] == ["premium", "expected_loss"]
    np.testing.assert_allclose(np.array(table[1:], dtype=float), frame[["premium", "expected_loss"]].to_numpy(), rtol=1e-12)
    with_names = F["LW_TOWER"](ref, 0.0, [1e6, 2e6], [["wang 0.2"], ["ph 0.7"]], None, None, None, None, [["distortion", "premium"]])
    assert [r[0] for r in with_names[1:]] == ["wang 0.2", "wang 0.2", "ph 0.7", "ph 0.7"]


def test_model_info_reports_the_annual_distribution(ylt, fs, annual_losses):
    rows = dict(map(tuple, F["LW_MODEL_INFO"](ylt[0])[1:]))
    assert rows["kind"] == "year loss table" and rows["reference"] == ylt[0]
    assert rows["annual mean"] == pytest.approx(annual_losses.mean(), rel=1e-12)
    assert rows["years"] == annual_losses.size and rows["builds"] >= 1
    fs_rows = dict(map(tuple, F["LW_MODEL_INFO"](fs[0])[1:]))
    assert fs_rows["annual mean"] == pytest.approx(fs[1].annual().mean(), rel=1e-12)
    assert fs_rows["annual mean (exact)"] == pytest.approx(2 * 1e6, rel=1e-9)


def test_cache_info_lists_models(ylt):
    table = F["LW_CACHE_INFO"]()
    assert table[0] == ["reference", "bytes", "builds"]
    assert table[1][0] == "(cap)" and table[1][1] == handles.memory_cap()
    assert ylt[0] in [r[0] for r in table[3:]]


# =========================================================================== bad input -> error values
def _bad_cases(fs_ref, ylt_ref):
    S = "lognormal(mean=1000000, cv=1.5)"
    P = "poisson(mean=2)"
    return [
        # (function, args, code, argument)
        ("LW_SEVERITY", ("lognormal", "abc", 2.0), "#VALUE!", "param1"),
        ("LW_SEVERITY", ("lognormal", -5.0, 2.0), "#VALUE!", "param1"),
        ("LW_SEVERITY", ("lognormal", 5.0), "#VALUE!", "param2"),
        ("LW_SEVERITY", ("lognormal", 5.0, 1.0, 3.0), "#VALUE!", "param3"),
        ("LW_SEVERITY", ("lognormal", 5.0, None, 3.0), "#VALUE!", "param3"),
        ("LW_SEVERITY", ("lognormall", 5.0, 1.0), "#VALUE!", "family"),
        ("LW_SEVERITY", (None, 5.0, 1.0), "#VALUE!", "family"),
        ("LW_SEVERITY", ("norm", 5.0, 1.0), "#VALUE!", "family"),
        ("LW_SEVERITY", ("pareto", math.nan, 1.0), "#VALUE!", "param1"),
        ("LW_SEVERITY", ("weibull", 2.0, math.inf), "#VALUE!", "param2"),
        ("LW_FREQUENCY", ("poisson", -1.0), "#VALUE!", "param1"),
        ("LW_FREQUENCY", ("poisson", True), "#VALUE!", "param1"),
        ("LW_FREQUENCY", ("negative_binomial", 5.0, 0.1), "#VALUE!", "param2"),
        ("LW_FREQUENCY", ("binomial", 2.5, 0.1), "#VALUE!", "param1"),
        ("LW_FREQUENCY", ("geometric", 2.0), "#VALUE!", "family"),
        ("LW_FREQUENCY", ("poisson", 2.0, 3.0), "#VALUE!", "param2"),
        ("LW_MODEL_FREQSEV", ("poisson", S), "#VALUE!", "frequency"),
        ("LW_MODEL_FREQSEV", (P, "lognormal 5"), "#VALUE!", "severity"),
        ("LW_MODEL_FREQSEV", (P, S, -1.0), "#VALUE!", "bucket"),
        ("LW_MODEL_FREQSEV", (P, S, None, 1000.0), "#VALUE!", "grid_length"),
        ("LW_MODEL_FREQSEV", (P, S, None, 1024.5), "#VALUE!", "grid_length"),
        ("LW_MODEL_FREQSEV", (P, S, None, None, "spline"), "#VALUE!", "method"),
        ("LW_MODEL_FREQSEV", ("#DIV/0!", S), "#DIV/0!", "frequency"),
        ("LW_MODEL_YEARLOSS", ([[None], [None]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], ["x"], [2.0]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], [None], [2.0]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], [-2.0]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], [math.nan]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0, 2.0], [3.0, 4.0]],), "#VALUE!", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], ["#N/A"]],), "#N/A", "losses"),
        ("LW_MODEL_YEARLOSS", ([[1.0], [2.0]], [[1.0]]), "#VALUE!", "weights"),
        ("LW_MODEL_YEARLOSS", ([[1.0], [2.0]], [[0.0], [0.0]]), "#VALUE!", "weights"),
        ("LW_MODEL_YEAREVENT", ([[1.0], [2.5]], [[1.0], [2.0]]), "#VALUE!", "years"),
        ("LW_MODEL_YEAREVENT", ([[0.0], [2.0]], [[1.0], [2.0]]), "#VALUE!", "years"),
        ("LW_MODEL_YEAREVENT", ([[1.0], [2.0]], [[1.0]]), "#VALUE!", "losses"),
        ("LW_MODEL_YEAREVENT", ([[1.0], [5.0]], [[1.0], [2.0]], 3.0), "#VALUE!", "n_years"),
        ("LW_MODEL_SCENARIOS", ([[0.0], [1.0]], [[0.5], [0.4]]), "#VALUE!", "probabilities"),
        ("LW_MODEL_SCENARIOS", ([[0.0], [1.0]], [[0.5]]), "#VALUE!", "probabilities"),
        ("LW_MODEL_SCENARIOS", ([[0.0], [1.0]], [[1.5], [-0.5]]), "#VALUE!", "probabilities"),
        ("LW_MODEL_SCENARIOS", ([], [[1.0]]), "#VALUE!", "outcomes"),
        ("LW_DISTORTION", ("wang", -0.5), "#VALUE!", "value"),
        ("LW_DISTORTION", ("ph", 1.5), "#VALUE!", "value"),
        ("LW_DISTORTION", ("gumbel", 0.5), "#VALUE!", "family"),
        ("LW_DISTORTION", ("wang",), "#VALUE!", "family"),
        ("LW_DISTORTION", ("wang", "0.4"), "#VALUE!", "value"),
        ("LW_DISTORTION", ("wang", [[0.1, 0.2]]), "#VALUE!", "value"),
        ("LW_DISTORTION_BLEND", ([["wang 0.4"], ["ph 0.5"]], [[0.5], [0.4]]), "#VALUE!", "weights"),
        ("LW_DISTORTION_BLEND", ([["wang 0.4"], ["ph 0.5"]], [[1.0]]), "#VALUE!", "weights"),
        ("LW_DISTORTION_BLEND", ([["wang 0.4"], ["nope 1"]], [[0.5], [0.5]]), "#VALUE!", "distortions"),
        ("LW_DISTORTION_BLEND", ([[None]], [[1.0]]), "#VALUE!", "distortions"),
        ("LW_DISTORTION_TABLE", ([[0.0], [0.5], [1.0]], [[0.0], [0.2], [1.0]]), "#VALUE!", "g"),
        ("LW_DISTORTION_TABLE", ([[0.1], [1.0]], [[0.0], [1.0]]), "#VALUE!", "s"),
        ("LW_DISTORTION_TABLE", ([[0.0], [1.0]], [[0.0], [1.0]], "maybe"), "#VALUE!", "require_concave"),
        ("LW_DISTORTION_VALUE", ("wang 0.4", 1.5), "#VALUE!", "s"),
        ("LW_DISTORTION_VALUE", ("wang 0.4", [[0.5, "x"]]), "#VALUE!", "s"),
        ("LW_DISTORTION_VALUE", ("", 0.5), "#VALUE!", "distortion"),
        ("LW_EXPECTED_LOSS", (fs_ref, -1.0, 1e6), "#VALUE!", "attachment"),
        ("LW_EXPECTED_LOSS", (fs_ref, 0.0, None), "#VALUE!", "limit"),
        ("LW_EXPECTED_LOSS", ("not a model", 0.0, 1e6), "#VALUE!", "model"),
        ("LW_EXPECTED_LOSS", (None, 0.0, 1e6), "#VALUE!", "model"),
        ("LW_PREMIUM", (fs_ref, 1e6, -5.0, "wang 0.4"), "#VALUE!", "limit"),
        ("LW_PREMIUM", (fs_ref, "1e6", 5e6, "wang 0.4"), "#VALUE!", "attachment"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang"), "#VALUE!", "distortion"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", 0.0), "#VALUE!", "share"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", None, "monthly"), "#VALUE!", "basis"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", None, None, 1.5), "#VALUE!", "reinstatements"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", None, "aggregate", 1.0), "#VALUE!", "reinstatements"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", None, None, None, -1.0), "#VALUE!", "agg_deductible"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "#N/A"), "#N/A", "distortion"),
        ("LW_PREMIUM", (ylt_ref, 1e6, 5e6, "wang 0.4", None, "occurrence"), "#VALUE!", "basis"),
        ("LW_PREMIUM", ("yearloss#" + "0" * 24, 1e6, 5e6, "wang 0.4"), "#REF!", "model"),
        ("LW_PREMIUM", (fs_ref, 1e6, 5e6, "wang 0.4", 1, 2, 3, 4, 5), "#VALUE!", "arguments"),
        ("LW_MARGIN", (fs_ref, 1e6, 5e6, "tvar 1.0"), "#VALUE!", "distortion"),
        ("LW_LOSS_RATIO", (fs_ref, 1e6, 5e6, "ph 0"), "#VALUE!", "distortion"),
        ("LW_RATE_ON_LINE", (fs_ref, 1e6, "lots", "ph 0.5"), "#VALUE!", "limit"),
        ("LW_CAPITAL", (fs_ref, 1e6, 5e6, "ph 0.5", "all"), "#VALUE!", "share"),
        ("LW_RETURN_ON_CAPITAL", (fs_ref, math.inf, 5e6, "ph 0.5"), "#VALUE!", "attachment"),
        ("LW_LAYER_STAT", (fs_ref, 1e6, 5e6, "kurtosis"), "#VALUE!", "statistic"),
        ("LW_LAYER_STAT", (fs_ref, 1e6, 5e6, "var"), "#VALUE!", "level"),
        ("LW_LAYER_STAT", (fs_ref, 1e6, 5e6, "tvar", 1.0), "#VALUE!", "level"),
        ("LW_TOWER", (fs_ref, [[0.0], [1.0]], [[1e6], [2e6], [3e6]], "wang 0.4"), "#VALUE!", "attachments"),
        ("LW_TOWER", (fs_ref, 0.0, [[1e6], [0.0]], "wang 0.4"), "#VALUE!", "limits"),
        ("LW_TOWER", (fs_ref, 0.0, [[1e6], [2e6]], "wang 0.4", [[0.5], [0.5], [0.5]]), "#VALUE!", "shares"),
        ("LW_TOWER", (fs_ref, 0.0, [[1e6], [2e6]], "wang 0.4", None, None, None, None, "premium, profit"), "#VALUE!", "columns"),
        ("LW_TOWER", (fs_ref, 0.0, [[1e6], [2e6]], [[None]]), "#VALUE!", "distortion"),
        ("LW_TOWER", (ylt_ref, 0.0, [[1e6], [2e6]], "wang 0.4", None, None, [[1.0], [1.0]]), "#VALUE!", "reinstatements"),
        ("LW_PREMIUM", ("freqsev(poisson 2, lognormal 1e6 1.5, bucket=300000)", 0.0, 1e6, "wang 0.4"), "#VALUE!", "model"),
        ("LW_MODEL_INFO", ("freqsev(poisson 2)",), "#VALUE!", "model"),
        ("LW_MODEL_INFO", ("scenarios#" + "f" * 24,), "#REF!", "model"),
    ]


def test_bad_inputs_give_error_values_naming_the_argument(fs, ylt):
    cases = _bad_cases(fs[0], ylt[0])
    assert {c[0] for c in cases} >= {n for n, f in F.items() if f.__module__ == functions.__name__} - {"LW_CACHE_INFO"}
    for name, args, code, argument in cases:
        out = F[name](*args)
        info = cells.parse_error(out)
        assert info is not None, (name, args, out)
        assert (info.code, info.function, info.argument) == (code, name, argument), (args, out)
        assert out.startswith(f"{code} {name}({argument}): ") and info.message, out


def test_error_from_another_cell_is_passed_on_with_its_code(fs):
    upstream = F["LW_DISTORTION"]("wang", -1.0)
    out = F["LW_PREMIUM"](fs[0], 1e6, 5e6, upstream)
    info = cells.parse_error(out)
    assert info.code == "#VALUE!" and info.argument == "distortion" and upstream in out
    stale = F["LW_PREMIUM"]("yearloss#" + "1" * 24, 1e6, 5e6, "wang 0.4")
    assert cells.parse_error(F["LW_PREMIUM"](stale, 1e6, 5e6, "wang 0.4")).code == "#REF!"


def test_results_that_are_not_numbers_become_num_errors(scen):
    ref = scen[0]
    # a layer above every outcome has zero premium: its loss ratio is undefined
    out = F["LW_LOSS_RATIO"](ref, 1e9, 1e6, "wang 0.4")
    info = cells.parse_error(out)
    assert info.code == "#NUM!" and info.function == "LW_LOSS_RATIO" and info.argument == "result"


def test_internal_failures_are_contained(monkeypatch, fs):
    def boom(*a, **k):
        raise RuntimeError("engine exploded")

    monkeypatch.setattr(functions, "price_layers", boom)
    out = F["LW_PREMIUM"](fs[0], 1e6, 5e6, "wang 0.4")
    assert out.startswith("#VALUE! LW_PREMIUM(internal): RuntimeError: engine exploded")


cell_values = st.one_of(
    st.none(), st.booleans(), st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
    st.sampled_from(["#N/A", "wang 0.4", "poisson 2", "unlimited", "yearloss#" + "0" * 24, "", "aggregate"]),
)
cell_args = st.one_of(cell_values, st.lists(st.lists(cell_values, min_size=1, max_size=3), min_size=1, max_size=3))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_no_function_ever_raises(data):
    for name, f in F.items():
        n = len(f.__xlfunc__["args"])
        args = data.draw(st.lists(cell_args, min_size=0, max_size=n + 1), label=name)
        out = f(*args)
        assert isinstance(out, (str, float, bool, list)), (name, args, out)
        if isinstance(out, float):
            assert math.isfinite(out)


# =========================================================================== headless recalculation
def test_functions_work_in_headless_recalculation(tmp_path, fs, annual_losses):
    recalc = pytest.importorskip("layerwise.addin.recalc")
    openpyxl = pytest.importorskip("openpyxl")
    from openpyxl.worksheet.formula import ArrayFormula

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Sheet1"
    x = annual_losses[:40]
    for i, v in enumerate(x, start=1):
        ws.cell(i, 1, float(v))
    ws["C1"] = '=LW_MODEL_FREQSEV("poisson 2","lognormal 1e6 1.5")'
    ws["C2"] = '=LW_PREMIUM(C1, 1000000, 4000000, "wang 0.4", "", "", 1)'
    ws["C3"] = '=LW_PREMIUM(C1, -1, 4000000, "wang 0.4")'
    ws["C4"] = "=LW_MODEL_YEARLOSS(A1:A60)"
    ws["C5"] = "=LW_EXPECTED_LOSS(C4, 1000000, 2000000)"
    ws["C6"] = '=LW_PREMIUM(C1, 1000000, 4000000, C3)'
    ws["E1"] = ArrayFormula("E1:F3", '=LW_TOWER(C1, 0, {1000000;2000000}, "ph 0.8", "", "", "", "", "layer,premium")')
    wb.save(tmp_path / "book.xlsx")
    run = recalc.recalculate(tmp_path / "book.xlsx", tmp_path / "priced.xlsx", functions=FUNCTIONS)
    v = {k.split("!")[1]: val for k, val in run.values.items()}
    ref, model = fs
    assert v["C1"] == ref
    same(v["C2"], engine_row(model, lw.Layer.occurrence(1e6, 4e6, reinstatements=1), lw.WangTransform(0.4))["premium"], "LW_PREMIUM")
    assert cells.parse_error(v["C3"]).argument == "attachment"
    assert v["C4"].startswith("yearloss#")  # (cells round-trip through the file to within an ulp, so no hash check)
    assert v["C5"] == pytest.approx(np.mean(np.clip(x - 1e6, 0, 2e6)), rel=1e-9)
    assert cells.parse_error(v["C6"]).code == "#VALUE!" and v["C3"] in v["C6"]
    frame = lw.price_layers(model, lw.stack([1e6, 2e6]), lw.ProportionalHazard(0.8))
    assert [v["E1"], v["F1"]] == ["layer", "premium"]
    assert v["E2"] == frame["layer"][0] and v["F3"] == pytest.approx(frame["premium"][1], rel=1e-12)


def test_return_on_capital_of_a_layer_priced_at_its_limit_says_why():
    """TVaR at p prices a layer at its full limit when the layer is hit more often than 1 - p (the top p
    quantile lies above its exhaustion point): no capital, so no return can be stated.
    """
    # common practice, no source: a fully collateralised layer needs limit - premium of capital
    ref = F["LW_MODEL_SCENARIOS"]([[0.0], [1e7]], [[0.5], [0.5]])  # half the years exhaust the layer
    assert F["LW_PREMIUM"](ref, 1e6, 2e6, "tvar 0.9", 1, "aggregate") == pytest.approx(2e6, rel=1e-12)
    out = F["LW_RETURN_ON_CAPITAL"](ref, 1e6, 2e6, "tvar 0.9", 1, "aggregate")
    assert isinstance(out, str) and out.startswith("#NUM! LW_RETURN_ON_CAPITAL(distortion): no return can be stated")
    assert F["LW_CAPITAL"](ref, 1e6, 2e6, "tvar 0.9", 1, "aggregate") == 0.0
