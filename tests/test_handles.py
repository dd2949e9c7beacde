"""References across cells: content-based, parseable, and backed by a bounded, thread-safe model cache
whose evictions cause a rebuild or a clear error, never a wrong number."""
from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import layerwise.engine as lw
from layerwise.addin import cells, handles
from layerwise.addin.functions import FUNCTIONS as F


@pytest.fixture
def fresh_cache():
    """An empty process cache with zeroed counters; the cap is restored afterwards."""
    cap = handles.memory_cap()
    handles.CACHE.clear(reset_counts=True)
    yield handles.CACHE
    handles.set_memory_cap(cap)
    handles.CACHE.clear(reset_counts=True)


def premium(model, a, l, g, layer=None):
    return float(lw.price_layers(model, [layer or lw.Layer.occurrence(a, l)], g)["premium"].iloc[0])


# =========================================================================== same inputs, same reference
def test_same_inputs_give_the_same_reference(fresh_cache):
    x = np.random.default_rng(3).gamma(2.0, 1e6, 300)
    assert F["LW_MODEL_YEARLOSS"]([[v] for v in x]) == F["LW_MODEL_YEARLOSS"](list(x))
    assert F["LW_MODEL_YEARLOSS"]([[v] for v in x]) != F["LW_MODEL_YEARLOSS"]([[v] for v in x[:-1]])
    assert F["LW_MODEL_YEARLOSS"](list(x)) != F["LW_MODEL_YEARLOSS"](list(x), [1.0] * x.size)
    years, losses = [[1.0], [2.0], [2.0]], [[5.0], [6.0], [7.0]]
    assert F["LW_MODEL_YEAREVENT"](years, losses) == F["LW_MODEL_YEAREVENT"](years, losses, 2.0)
    assert F["LW_MODEL_YEAREVENT"](years, losses) != F["LW_MODEL_YEAREVENT"](years, losses, 3.0)
    assert F["LW_MODEL_SCENARIOS"]([0.0, 1.0], [0.5, 0.5]) != F["LW_MODEL_YEARLOSS"]([0.0, 1.0])
    # integers and floats are the same cell values
    assert F["LW_SEVERITY"]("lognormal", 2000000, 2.5) == F["LW_SEVERITY"]("Lognormal", 2e6, 2.5)
    assert F["LW_FREQUENCY"]("poisson", 5) == F["LW_FREQUENCY"]("POISSON", 5.0)
    specs = {
        F["LW_DISTORTION"]("wang", 0.4), F["LW_DISTORTION"]("wang 0.4"), F["LW_DISTORTION"]("Wang(lam=0.4)"),
        F["LW_DISTORTION"]("wang", [[0.4]]), F["LW_DISTORTION"]("  wang(0.4) "),
    }
    assert specs == {"wang(lam=0.4)"}
    m1 = F["LW_MODEL_FREQSEV"]("poisson 5", "lognormal 2e6 2.5")
    m2 = F["LW_MODEL_FREQSEV"](F["LW_FREQUENCY"]("poisson", 5.0), F["LW_SEVERITY"]("lognormal", 2e6, 2.5))
    assert m1 == m2 == "freqsev(poisson(mean=5), lognormal(mean=2000000, cv=2.5))"
    assert F["LW_MODEL_FREQSEV"]("poisson 5", "lognormal 2e6 2.5", 1000.0) != m1


@pytest.mark.parametrize("text, want", [
    ("wang 0.4", lw.WangTransform(0.4)),
    ("WANG(0.4)", lw.WangTransform(0.4)),
    ("ph 0.8", lw.ProportionalHazard(0.8)),
    ("proportional hazard(r=0.8)", lw.ProportionalHazard(0.8)),
    ("tvar 99%", lw.TVaRDistortion(0.99)),
    ("dual power 2", lw.DualPower(2.0)),
    ("ccoc 0.1", lw.CostOfCapital(0.1)),
    ("blend(0.25*wang 0.4, 0.75*ph(r=0.5))", lw.Blend((lw.WangTransform(0.4), lw.ProportionalHazard(0.5)), (0.25, 0.75))),
    ("table(s=[0, .5, 1], g=[0, .8, 1])", lw.TableDistortion((0.0, 0.5, 1.0), (0.0, 0.8, 1.0))),
])
def test_typed_distortions(text, want):
    assert handles.parse_distortion(text) == want


@pytest.mark.parametrize("text", [
    "", "wang", "wang 0.4 0.5", "wang(x=0.4)", "wang(lam=0.4, lam=0.5)", "blend(wang 0.4)", "table(s=[0, 1])",
    "((", "wang(0.4", "gumbel 2", "ph 2", "table(s=[0, 1], g=[0, 1], concave=perhaps)", "3*wang 0.4",
    "distortion#" + "a" * 24, "yearloss#" + "a" * 24,
])
def test_unreadable_distortions_are_input_errors(text):
    with pytest.raises(lw.InputError) as err:
        handles.distortion_from(text, "distortion")
    assert err.value.argument == "distortion"


finite = st.floats(min_value=1e-6, max_value=1e9, allow_nan=False)
unit_open = st.floats(min_value=1e-9, max_value=1.0, exclude_min=True, allow_nan=False)


@settings(max_examples=60, deadline=None)
@given(
    g=st.one_of(
        st.builds(lw.WangTransform, st.floats(0.0, 20.0)),
        st.builds(lw.ProportionalHazard, unit_open),
        st.builds(lw.DualPower, st.floats(1.0, 1e6)),
        st.builds(lw.TVaRDistortion, st.floats(0.0, 0.999999)),
        st.builds(lw.CostOfCapital, st.floats(0.0, 100.0)),
    ),
    w=st.floats(0.0, 1.0),
)
def test_distortion_specs_round_trip(g, w):
    spec = handles.distortion_spec(g)
    assert handles.parse_distortion(spec) == g
    blend = lw.Blend((g, lw.WangTransform(0.3)), (w, 1.0 - w))
    back = handles.parse_distortion(handles.distortion_spec(blend))
    assert back == blend and handles.distortion_spec(back) == handles.distortion_spec(blend)


@settings(max_examples=60, deadline=None)
@given(mean=finite, cv=st.floats(1e-3, 50.0), shape=st.floats(0.05, 20.0), scale=finite, n=st.integers(1, 10_000),
       q=unit_open)
def test_severity_and_frequency_specs_round_trip(mean, cv, shape, scale, n, q):
    for sev in (lw.lognormal(mean, cv), lw.gamma(mean=mean, cv=cv), lw.gamma(shape, scale), lw.pareto(shape, scale),
                lw.weibull(shape, scale), lw.exponential(mean), lw.single_pareto(shape, scale),
                lw.generalized_pareto(shape, scale), lw.lognormal(mu=math.log(mean), sigma=cv)):
        assert handles.parse_severity(handles.severity_spec(sev)) == sev
    for freq in (lw.poisson(mean if mean < 1e7 else 5.0), lw.binomial(n, q), lw.fixed_count(n),
                 lw.frequency.NegativeBinomial(min(mean, 1e6), cv)):
        assert handles.parse_frequency(handles.frequency_spec(freq)) == freq


def test_long_table_distortion_goes_to_the_registry(fresh_cache):
    s = np.linspace(0.0, 1.0, 400)
    g = np.sqrt(s)  # concave
    ref = F["LW_DISTORTION_TABLE"](s.tolist(), g.tolist())
    assert ref.startswith("distortion#") and len(ref) < 40
    assert F["LW_DISTORTION_TABLE"]([[v] for v in s], [[v] for v in g]) == ref
    scen = F["LW_MODEL_SCENARIOS"]([0.0, 5.0, 10.0], [0.5, 0.3, 0.2])
    model = lw.ScenarioTable([0.0, 5.0, 10.0], [0.5, 0.3, 0.2])
    want = premium(model, 0, 10, lw.TableDistortion(tuple(s), tuple(g)), lw.Layer.aggregate(0.0, 10.0))
    assert F["LW_PREMIUM"](scen, 0.0, 10.0, ref) == pytest.approx(want, rel=1e-12)
    blend = F["LW_DISTORTION_BLEND"]([ref, "wang 0.1"], [0.5, 0.5])
    assert blend.startswith("distortion#") and blend != ref  # the blend's spec is long too
    both = lw.Blend((lw.TableDistortion(tuple(s), tuple(g)), lw.WangTransform(0.1)), (0.5, 0.5))
    want = premium(model, 0, 10, both, lw.Layer.aggregate(0.0, 10.0))
    assert F["LW_PREMIUM"](scen, 0.0, 10.0, blend) == pytest.approx(want, rel=1e-12)
    fresh_cache.clear()
    out = F["LW_PREMIUM"](F["LW_MODEL_SCENARIOS"]([0.0, 5.0, 10.0], [0.5, 0.3, 0.2]), 0.0, 10.0, ref)
    assert cells.parse_error(out).code == "#REF!" and "LW_DISTORTION_TABLE" in out


# =========================================================================== build counts
def test_one_build_per_distinct_model(fresh_cache):
    ref = F["LW_MODEL_FREQSEV"]("poisson 3", "pareto 2.5 1e6")
    for a in (0.0, 1e6, 2e6):
        for g in ("wang 0.3", "ph 0.7"):
            F["LW_PREMIUM"](ref, a, 1e6, g)
            F["LW_PREMIUM"]("freqsev(poisson(mean=3), pareto(shape=2.5, scale=1000000))", a, 1e6, g)
    F["LW_TOWER"](ref, 0.0, [1e6, 1e6, 1e6], "wang 0.3")
    F["LW_MODEL_INFO"](ref)
    assert handles.build_count(ref) == 1
    x = [[1.0], [2.0], [3.0]]
    refs = {F["LW_MODEL_YEARLOSS"](x) for _ in range(5)}
    ylt = refs.pop()
    for _ in range(5):
        F["LW_EXPECTED_LOSS"](ylt, 1.0, 1.0)
    assert handles.build_count(ylt) == 1
    assert handles.build_count() == {ref: 1, ylt: 1}


def test_concurrent_cells_build_once_and_agree(fresh_cache):
    spec = "freqsev(poisson 2, gamma 1e6 0.8)"
    model = lw.FrequencySeverity(lw.poisson(2), lw.gamma(mean=1e6, cv=0.8))
    terms = [(a, l) for a in (0.0, 5e5, 1e6, 2e6) for l in (5e5, 1e6, 3e6)]
    want = {t: premium(model, t[0], t[1], lw.WangTransform(0.25)) for t in terms}
    with ThreadPoolExecutor(8) as pool:
        got = list(pool.map(lambda t: F["LW_PREMIUM"](spec, t[0], t[1], "wang 0.25"), terms * 4))
    for t, g in zip(terms * 4, got):
        assert g == pytest.approx(want[t], rel=1e-12)
    assert handles.build_count(handles.resolve_model(spec)[0]) == 1


# =========================================================================== eviction
def test_eviction_rebuilds_a_frequency_severity_model(fresh_cache):
    handles.set_memory_cap(1)  # tiny: only the model in use is ever held
    a = F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5")
    first = F["LW_PREMIUM"](a, 1e6, 2e6, "wang 0.4")
    assert handles.build_count(a) == 1
    b = F["LW_MODEL_FREQSEV"]("poisson 4", "lognormal 5e5 2")
    assert F["LW_PREMIUM"](b, 1e6, 2e6, "wang 0.4") != first
    assert a not in fresh_cache and b in fresh_cache and len(fresh_cache) == 1
    again = F["LW_PREMIUM"](a, 1e6, 2e6, "wang 0.4")
    model = lw.FrequencySeverity(lw.poisson(2), lw.lognormal(1e6, 1.5))
    assert again == first == pytest.approx(premium(model, 1e6, 2e6, lw.WangTransform(0.4)), rel=1e-12)
    assert handles.build_count(a) == 2 and handles.build_count(b) == 1
    assert fresh_cache.evictions >= 2


def test_eviction_of_a_data_model_is_a_clear_error(fresh_cache):
    handles.set_memory_cap(1)
    rng = np.random.default_rng(5)
    xa, xb = rng.exponential(1e6, 500), rng.exponential(2e6, 500)
    a = F["LW_MODEL_YEARLOSS"]([[v] for v in xa])
    first = F["LW_PREMIUM"](a, 1e6, 2e6, "wang 0.4")
    b = F["LW_MODEL_YEARLOSS"]([[v] for v in xb])
    assert a not in fresh_cache and b in fresh_cache
    out = F["LW_PREMIUM"](a, 1e6, 2e6, "wang 0.4")
    info = cells.parse_error(out)
    assert (info.code, info.function, info.argument) == ("#REF!", "LW_PREMIUM", "model")
    assert a in out and "recalculate" in out and "LW_MODEL_YEARLOSS" in out
    # recalculating the builder cell brings it back: same reference, same number
    assert F["LW_MODEL_YEARLOSS"]([[v] for v in xa]) == a
    assert F["LW_PREMIUM"](a, 1e6, 2e6, "wang 0.4") == first
    assert first == pytest.approx(premium(lw.YearLossTable(xa), 0, 0, lw.WangTransform(0.4), lw.Layer.aggregate(1e6, 2e6)), rel=1e-12)
    assert handles.build_count(a) == 2


def test_cached_distributions_go_before_models(fresh_cache):
    rng = np.random.default_rng(9)
    years = rng.integers(1, 2001, 20_000).astype(float)
    losses = rng.exponential(1e6, 20_000)
    yet = F["LW_MODEL_YEAREVENT"](years.tolist(), losses.tolist())
    fs = F["LW_MODEL_FREQSEV"]("poisson 1", "exponential 1e6")
    for a in (0.0, 1e6, 2e6, 3e6):
        F["LW_PREMIUM"](yet, a, 1e6, "wang 0.2")
    data_only = handles.ENTRY_OVERHEAD + years.nbytes + losses.nbytes
    assert fresh_cache.size_of(yet) > data_only  # it holds distributions too
    handles.set_memory_cap(data_only + 4 * handles.ENTRY_OVERHEAD)
    F["LW_PREMIUM"](fs, 0.0, 1e6, "wang 0.2")  # fs is in use: others give back memory
    assert yet in fresh_cache and fresh_cache.size_of(yet) == data_only
    assert fs not in fresh_cache or fresh_cache.nbytes <= fresh_cache.cap
    # and the year-event table still prices correctly (distributions recomputed)
    model = lw.YearEventTable(years, losses)
    assert F["LW_PREMIUM"](yet, 2e6, 1e6, "wang 0.2") == pytest.approx(premium(model, 2e6, 1e6, lw.WangTransform(0.2)), rel=1e-12)


def test_memory_accounting_stays_within_the_cap(fresh_cache):
    cap = 3 << 20
    handles.set_memory_cap(cap)
    refs = [F["LW_MODEL_FREQSEV"](f"poisson {k}", "lognormal 1e6 2") for k in (1, 2, 3, 4)]
    for r in refs:
        for a in (0.0, 1e6):
            assert isinstance(F["LW_PREMIUM"](r, a, 2e6, "ph 0.8"), float)
        entries = fresh_cache.entries()
        assert fresh_cache.nbytes == sum(e["bytes"] for e in entries)
        assert fresh_cache.nbytes <= cap or len(entries) == 1


def test_churn_under_a_tiny_cap_never_gives_a_wrong_number(fresh_cache):
    handles.set_memory_cap(1)
    specs = [("poisson 1", "exponential 1e6"), ("poisson 2", "exponential 1e6"), ("poisson 1", "exponential 2e6")]
    models = [lw.FrequencySeverity(lw.poisson(1), lw.exponential(1e6)), lw.FrequencySeverity(lw.poisson(2), lw.exponential(1e6)),
              lw.FrequencySeverity(lw.poisson(1), lw.exponential(2e6))]
    refs = [F["LW_MODEL_FREQSEV"](*s) for s in specs]
    want = [premium(m, 5e5, 1e6, lw.DualPower(1.5)) for m in models]
    jobs = [i % 3 for i in range(36)]
    with ThreadPoolExecutor(6) as pool:
        got = list(pool.map(lambda i: F["LW_PREMIUM"](refs[i], 5e5, 1e6, "dual 1.5"), jobs))
    for i, g in zip(jobs, got):
        assert g == pytest.approx(want[i], rel=1e-12)


def test_cap_from_environment(monkeypatch):
    monkeypatch.setenv("LAYERWISE_CACHE_MB", "64")
    assert handles._cap_from_env() == 64 << 20
    monkeypatch.setenv("LAYERWISE_CACHE_MB", "lots")
    assert handles._cap_from_env() == handles.DEFAULT_CAP_BYTES
    monkeypatch.delenv("LAYERWISE_CACHE_MB")
    assert handles._cap_from_env() == handles.DEFAULT_CAP_BYTES == 1 << 30
    with pytest.raises(ValueError):
        handles.ModelCache().set_cap(-1)


def test_error_value_format_round_trips():
    text = cells.error_value("#REF!", "LW_PREMIUM", "model", "yearloss#ab is not in memory;\n recalculate")
    assert text == "#REF! LW_PREMIUM(model): yearloss#ab is not in memory; recalculate"
    assert cells.parse_error(text) == cells.ErrorInfo("#REF!", "LW_PREMIUM", "model", "yearloss#ab is not in memory; recalculate")
    assert cells.parse_error("#N/A") == cells.ErrorInfo("#N/A", None, None, "")
    assert cells.parse_error("#DIV/0!") is not None and cells.parse_error("#hashtag") is None
    assert cells.parse_error("wang(lam=0.4)") is None and cells.parse_error(3.0) is None
