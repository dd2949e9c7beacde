"""Invariants of spectral layer prices, property-tested on engine objects.

Pure properties of distortion prices integral_a^{a+l} g(S(x)) dx with g concave, non-decreasing,
g(0) = 0, g(1) = 1, which hold exactly for every discrete distribution (grids included), so they are
checked to floating-point round-off:

* expected loss <= premium <= the most the layer can pay in a year (limit x share for an aggregate
  layer, limit x (1 + reinstatements) x share for an occurrence layer);
* the premium increases with the family's loading parameter (decreases in r for proportional hazard);
* stacked aggregate layers add up to the layer they tile (comonotonic additivity);
* TVaR at p = 0 is the expected value;
* results do not depend on repetition, on the process, or on the order layers are priced or models
  are built in.
"""
from __future__ import annotations

import json
import math
import os
import random
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import layerwise.engine as lw

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.errors.GridWarning")

SETTINGS = dict(deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
RTOL = 1e-11  # round-off allowance, relative to the layer's limit or price


# ----------------------------------------------------------------------------- models
def _fs_pool():
    return [
        lw.FrequencySeverity(lw.poisson(2), lw.lognormal(1e6, 1.5)),
        lw.FrequencySeverity(lw.negative_binomial(3, 0.8), lw.gamma(mean=5e5, cv=0.7)),
        lw.FrequencySeverity(lw.poisson(0.5), lw.pareto(2.5, 1e6)),
        lw.FrequencySeverity(lw.fixed_count(1), lw.exponential(1e6)),
        lw.FrequencySeverity(lw.poisson(1), lw.pareto(0.8, 1e6)),  # infinite mean: finite layers only
    ]


FS_POOL = _fs_pool()  # shared, so each grid is built once across examples


@st.composite
def models(draw, kinds=("scenarios", "yearloss", "yearevent", "freqsev")):
    kind = draw(st.sampled_from(kinds))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    if kind == "freqsev":
        return draw(st.sampled_from(FS_POOL))
    if kind == "scenarios":
        k = draw(st.integers(1, 25))
        outcomes = np.round(rng.lognormal(13.5, 1.5, k), -4)  # ties and an unsorted order
        outcomes[rng.random(k) < 0.2] = 0.0
        p = rng.dirichlet(np.ones(k))
        return lw.ScenarioTable(outcomes, p / p.sum())
    if kind == "yearloss":
        n = draw(st.integers(1, 400))
        x = rng.lognormal(13.5, 1.3, n) * (rng.random(n) < 0.7)
        w = rng.random(n) + 0.01 if draw(st.booleans()) else None
        return lw.YearLossTable(x, w)
    n = draw(st.integers(1, 300))
    years = rng.integers(1, 101, n).astype(float)
    return lw.YearEventTable(years, rng.pareto(1.7, n) * 5e5, 100)


def scale_of(model) -> float:
    return 1e6 if isinstance(model, lw.FrequencySeverity) else max(float(model.annual().max), 1.0)


def distortions():
    return st.one_of(
        st.floats(0.05, 1.0).map(lw.ProportionalHazard),
        st.floats(0.0, 3.0).map(lw.WangTransform),
        st.floats(1.0, 20.0).map(lw.DualPower),
        st.floats(0.0, 0.999).map(lw.TVaRDistortion),
        st.floats(0.0, 1.0).map(lw.CostOfCapital),
        st.tuples(st.floats(0.0, 1.0), st.floats(0.1, 1.0), st.floats(0.0, 0.99)).map(
            lambda t: lw.Blend((lw.ProportionalHazard(t[1]), lw.TVaRDistortion(t[2])), (t[0], 1.0 - t[0]))),
    )


@st.composite
def layers(draw, model, aggregate=None):
    s = scale_of(model)
    a = draw(st.floats(0.0, 4.0)) * s
    finite = model.infinite_mean or draw(st.sampled_from([True, True, True, False]))
    l = draw(st.floats(0.01, 5.0)) * s if finite else math.inf
    share = draw(st.sampled_from([1.0, 1.0, 0.5, 0.1]))
    agg = (not model.occurrence_terms) if aggregate is None else aggregate or not model.occurrence_terms
    if not agg and draw(st.booleans()):
        agg = True
    if agg:
        return lw.Layer.aggregate(a, l, share=share)
    rein = draw(st.sampled_from([None, 0, 1, 3])) if math.isfinite(l) else None
    return lw.Layer.occurrence(a, l, reinstatements=rein, share=share)


def row(model, layer, g):
    return lw.price_layers(model, [layer], g).iloc[0]


# ----------------------------------------------------------------------------- bounds
@settings(max_examples=150, **SETTINGS)
@given(data=st.data())
def test_expected_loss_below_premium_below_most_the_layer_pays(data):
    model = data.draw(models(), label="model")
    layer = data.draw(layers(model), label="layer")
    g = data.draw(distortions(), label="g")
    r = row(model, layer, g)
    el, prem, most = r["expected_loss"], r["premium"], layer.share * layer.max_annual_loss
    assert el >= 0
    assert prem >= el - RTOL * max(prem, 1.0), (layer, g, el, prem)
    if math.isfinite(most):
        assert prem <= most * (1 + RTOL), (layer, g, prem, most)
        if layer.is_aggregate:
            assert prem <= layer.share * layer.limit * (1 + RTOL)


# ----------------------------------------------------------------------------- loading
FAMILIES = [(lw.ProportionalHazard, (0.05, 1.0)), (lw.WangTransform, (0.0, 3.0)), (lw.DualPower, (1.0, 20.0)),
            (lw.TVaRDistortion, (0.0, 0.999)), (lw.CostOfCapital, (0.0, 2.0))]


@settings(max_examples=120, **SETTINGS)
@given(data=st.data())
def test_premium_increases_with_the_loading_parameter(data):
    model = data.draw(models(), label="model")
    layer = data.draw(layers(model), label="layer")
    cls, (lo, hi) = data.draw(st.sampled_from(FAMILIES), label="family")
    values = sorted(data.draw(st.lists(st.floats(lo, hi), min_size=2, max_size=5), label="values"))
    prices = lw.price_layers(model, [layer], {v: cls(v) for v in dict.fromkeys(values)})["premium"].to_numpy()
    if not cls.loads_up:  # proportional hazard: a smaller r loads more
        prices = prices[::-1]
    tol = RTOL * max(float(np.max(np.abs(prices))), 1.0)
    assert np.all(np.diff(prices) >= -tol), (cls, values, prices)


# ----------------------------------------------------------------------------- additivity
@settings(max_examples=120, **SETTINGS)
@given(data=st.data())
def test_stacked_aggregate_layers_add_up(data):
    model = data.draw(models(), label="model")
    s = scale_of(model)
    start = data.draw(st.floats(0.0, 2.0)) * s
    widths = [w * s for w in data.draw(st.lists(st.floats(0.01, 3.0), min_size=2, max_size=6), label="widths")]
    g = data.draw(distortions(), label="g")
    pieces = lw.stack(widths, start=start, basis="aggregate")
    whole = lw.Layer.aggregate(start, float(sum(widths)))
    df = lw.price_layers(model, pieces + [whole], g)
    for col in ("expected_loss", "premium"):
        parts, total = float(df[col].iloc[:-1].sum()), float(df[col].iloc[-1])
        assert parts == pytest.approx(total, rel=1e-9, abs=1e-9 * s), (col, g, parts, total)


@settings(max_examples=60, **SETTINGS)
@given(data=st.data())
def test_stacked_occurrence_layers_add_up_in_expected_loss(data):
    """Per-occurrence pieces of each loss add up loss by loss, so their expected losses add up (in prices
    they need not: the annual sums of the pieces are not comonotonic)."""
    model = data.draw(models(kinds=("yearevent", "freqsev")), label="model")
    s = scale_of(model)
    widths = [w * s for w in data.draw(st.lists(st.floats(0.05, 3.0), min_size=2, max_size=4), label="widths")]
    start = data.draw(st.floats(0.0, 1.0)) * s
    pieces = lw.stack(widths, start=start)
    whole = lw.Layer.occurrence(start, float(sum(widths)))
    df = lw.price_layers(model, pieces + [whole], lw.WangTransform(0.3))
    parts, total = float(df["expected_loss"].iloc[:-1].sum()), float(df["expected_loss"].iloc[-1])
    # exact for event tables; grids of different layers agree to their discretisation (moment matching)
    rel = 1e-12 if isinstance(model, lw.YearEventTable) else 1e-6
    assert parts == pytest.approx(total, rel=rel, abs=1e-12 * s)
    assert float(df["premium"].iloc[:-1].sum()) >= float(df["premium"].iloc[-1]) * (1 - 1e-6)  # subadditive


# ----------------------------------------------------------------------------- TVaR at 0
@settings(max_examples=80, **SETTINGS)
@given(data=st.data())
def test_tvar_at_zero_is_the_mean(data):
    model = data.draw(models(), label="model")
    layer = data.draw(layers(model), label="layer")
    r = row(model, layer, lw.TVaRDistortion(0.0))
    assert r["premium"] == pytest.approx(r["expected_loss"], rel=1e-14, abs=1e-300)
    u = model.annual() if not model.infinite_mean else model.annual().layer(0.0, 1e7)
    assert u.tvar(0.0) == pytest.approx(u.mean(), rel=1e-14)


# ----------------------------------------------------------------------------- determinism
TOWER = lw.stack([1e6, 2e6, 5e6], start=5e5) + lw.stack([2e6, 4e6], start=1e6, basis="aggregate") + [
    lw.Layer.occurrence(1e6, 3e6, reinstatements=1, share=0.4)]
GS = {"wang": lw.WangTransform(0.35), "ph": lw.ProportionalHazard(0.7), "tvar": lw.TVaRDistortion(0.95),
      "dual": lw.DualPower(1.6), "ccoc": lw.CostOfCapital(0.12)}
PRICE_COLUMNS = ["expected_loss", "premium", "std", "prob_attach", "prob_exhaust", "grid_error", "discretisation_error"]

# builds the same models and prices in a fresh interpreter; prints exact floats as hex
SCRIPT = textwrap.dedent("""
    import json, warnings
    import numpy as np
    import layerwise.engine as lw
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(12345)
    years = rng.integers(1, 501, 3000).astype(float)
    models = {
        "fs": lw.FrequencySeverity(lw.negative_binomial(4, 0.7), lw.lognormal(8e5, 2.0)),
        "heavy": lw.FrequencySeverity(lw.poisson(1.5), lw.pareto(1.5, 5e5)),
        "yet": lw.YearEventTable(years, rng.pareto(1.6, 3000) * 4e5, 500),
        "ylt": lw.YearLossTable(rng.lognormal(14, 1.2, 5000)),
    }
    TOWER = lw.stack([1e6, 2e6, 5e6], start=5e5) + lw.stack([2e6, 4e6], start=1e6, basis="aggregate") + [
        lw.Layer.occurrence(1e6, 3e6, reinstatements=1, share=0.4)]
    GS = {"wang": lw.WangTransform(0.35), "ph": lw.ProportionalHazard(0.7), "tvar": lw.TVaRDistortion(0.95),
          "dual": lw.DualPower(1.6), "ccoc": lw.CostOfCapital(0.12)}
    COLS = %r
    out = {}
    for name in ORDER:
        m = models[name]
        lays = TOWER if m.occurrence_terms else [l for l in TOWER if l.is_aggregate]
        df = lw.price_layers(m, lays, GS)
        out[name] = [[float(v).hex() for v in df[c]] for c in COLS]
    print(json.dumps(out))
""") % (PRICE_COLUMNS,)


def _run(order) -> dict:
    code = f"ORDER = {list(order)!r}\n" + SCRIPT
    ns: dict = {}
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        exec(compile(code, "<determinism>", "exec"), ns)
    return json.loads(buf.getvalue())


def _run_subprocess(order) -> dict:
    code = f"ORDER = {list(order)!r}\n" + SCRIPT
    env = dict(os.environ, PYTHONHASHSEED="0")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr[-2000:]
    return json.loads(done.stdout)


def test_results_are_identical_across_calls_processes_and_build_orders():
    order = ["fs", "heavy", "yet", "ylt"]
    here = _run(order)
    assert _run(order) == here  # repeated in this process (fresh models, warm module caches)
    assert _run(order[::-1]) == here  # models built in the other order
    assert _run_subprocess(order[::-1]) == here  # another process: exact same floats


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_prices_do_not_depend_on_the_order_of_layers(seed):
    rng = np.random.default_rng(seed)
    years = rng.integers(1, 301, 2000).astype(float)
    losses = rng.pareto(1.8, 2000) * 4e5
    builders = (lambda: lw.FrequencySeverity(lw.poisson(3), lw.gamma(mean=8e5, cv=1.2)),
                lambda: lw.YearEventTable(years, losses, 300))
    for build in builders:
        base = lw.price_layers(build(), TOWER, GS)
        perm = list(range(len(TOWER)))
        random.Random(seed).shuffle(perm)
        shuffled = lw.price_layers(build(), [TOWER[i] for i in perm], GS)  # a fresh model, layers in another order
        k = len(TOWER)
        for block in range(len(GS)):
            want = base.iloc[block * k:(block + 1) * k].reset_index(drop=True)
            got = shuffled.iloc[block * k:(block + 1) * k].reset_index(drop=True)
            for j, i in enumerate(perm):
                for c in PRICE_COLUMNS + ["layer", "warning"]:
                    a, b = want[c].iloc[i], got[c].iloc[j]
                    assert a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b)), (c, i, a, b)


def test_repeated_calls_and_a_cleared_cache_give_the_same_floats():
    model = lw.FrequencySeverity(lw.poisson(2), lw.weibull(0.6, 1e6))
    first = lw.price_layers(model, TOWER, GS)[PRICE_COLUMNS].to_numpy()
    again = lw.price_layers(model, TOWER, GS)[PRICE_COLUMNS].to_numpy()
    model.clear_cache()
    rebuilt = lw.price_layers(model, TOWER, GS)[PRICE_COLUMNS].to_numpy()
    assert np.array_equal(first, again, equal_nan=True) and np.array_equal(first, rebuilt, equal_nan=True)
