"""Split automatic grids and per-occurrence grids sized from the claims that reach a layer.

An automatic ground-up grid much longer than the aggregate's body is computed
as two shorter transforms: the body at the full resolution and the whole range
at a coarser bucket, used above the body. References here are the same model
on ONE uniform grid (same bucket and length: what the engine computed before
it split grids) and on a grid with half the bucket.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import layerwise.engine as lw
from layerwise.engine import models, pricing

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

M = 1e6
FREQ, SEV = lw.poisson(5.0), lw.lognormal(mean=M, cv=2.5)
G = {"ph": lw.ProportionalHazard(0.75), "wang": lw.WangTransform(0.35), "tvar": lw.TVaRDistortion(0.9)}


@pytest.fixture(scope="module")
def grids():
    auto = lw.FrequencySeverity(FREQ, SEV)
    h, n = auto.grid()
    uniform = lw.FrequencySeverity(FREQ, SEV, bucket=h, grid_length=n)
    finer = lw.FrequencySeverity(FREQ, SEV, bucket=h / 2, grid_length=2 * n)
    return auto, uniform, finer


def test_long_automatic_grids_are_split_and_given_ones_are_not(grids):
    auto, uniform, _ = grids
    h, n = auto.grid()
    (start, fine), (body_top, wide) = auto.resolution()
    assert start == 0.0 and fine == h and wide > h and (wide / h) == int(wide / h)
    assert body_top == auto.body_points() * h and body_top % wide == 0.0  # the body ends on a coarse grid point
    assert auto.body_points() * models.SPLIT_FACTOR <= n
    assert uniform.resolution() == ((0.0, h),) and uniform.body_points() == n
    # the body reaches where about BODY_BEYOND of the annual probability lies beyond
    u = auto.annual()
    assert 0 < u.survival(body_top) < 10 * models.BODY_BEYOND
    d = u.diagnostics
    assert d["body_top"] == body_top and d["tail_bucket"] == wide and d["grid_top"] == n * h == u.top
    # per-occurrence grids are never split
    assert len(auto.resolution(1 * M, 2 * M)) == 1


def test_the_body_is_the_uniform_grid_to_round_off(grids):
    """Below the body's top the split distribution is the one-grid distribution (the transform's round-off apart)."""
    auto, uniform, _ = grids
    body_top = auto.resolution()[1][0]
    xs = np.linspace(0.0, body_top * (1 - 1e-9), 2001)
    a, b = auto.annual().survival(xs), uniform.annual().survival(xs)
    assert np.max(np.abs(a / b - 1.0)) < 1e-8
    layers = lw.stack([5 * M] * 4 + [10 * M] * 3 + [20 * M] * 3, start=5 * M, basis="aggregate")
    assert layers[-1].agg_attachment + layers[-1].agg_limit < body_top
    pa, pb = lw.price_layers(auto, layers, G), lw.price_layers(uniform, layers, G)
    for col in ("expected_loss", "premium", "std", "prob_attach"):
        np.testing.assert_allclose(pa[col], pb[col], rtol=1e-9)


def test_above_the_body_errors_stay_within_the_estimate_and_tolerance(grids):
    """Layers above the body (and across its top) priced on the coarse part: the error against a grid
    with half the bucket stays below the discretisation-error estimate and the stated tolerance."""
    auto, _, finer = grids
    body_top = auto.resolution()[1][0]
    bounds = [0.6 * body_top, 0.9 * body_top, 1.3 * body_top, 2 * body_top, 4 * body_top, 8 * body_top]
    layers = lw.stack(np.diff(bounds), start=bounds[0], basis="aggregate")
    got, ref = lw.price_layers(auto, layers, G), lw.price_layers(finer, layers, G)
    err = np.maximum(np.abs(got["premium"] - ref["premium"]), np.abs(got["expected_loss"] - ref["expected_loss"]))
    assert np.all(err <= got["discretisation_error"] + 1e-12 * got["premium"]), (err, got["discretisation_error"])
    assert np.all(err <= pricing.DISCRETISATION_TOLERANCE * got["premium"])
    assert (got["warning"] == "").all()


def test_whole_distribution_matches_the_uniform_grid(grids):
    """Mean, a far quantile and the unlimited price of the split grid agree with one uniform grid."""
    auto, uniform, _ = grids
    a, b = auto.annual(), uniform.annual()
    assert a.mean() == pytest.approx(b.mean(), rel=1e-7)
    assert a.mean() == pytest.approx(FREQ.mean * SEV.mean, rel=1e-6)  # E[N] E[X]
    assert a.std() == pytest.approx(b.std(), rel=1e-5)
    assert a.beyond < 1e-9 and b.beyond < 1e-9  # both tiny: at this size the beyond mass is transform round-off
    for p in (0.5, 0.99, 0.9999):
        assert a.quantile(p) == b.quantile(p)  # inside the body: the same grid point
    q = 0.999999  # above the body: within one coarse bucket
    assert abs(a.quantile(q) - b.quantile(q)) <= auto.resolution()[1][1]
    for g in G.values():
        assert a.price(g) == pytest.approx(b.price(g), rel=1e-5)


def test_additivity_across_the_join(grids):
    """Comonotonic additivity holds on the split distribution, including layers that cross the body's top."""
    auto, _, _ = grids
    body_top = auto.resolution()[1][0]
    bounds = np.array([0.0, 0.3, 0.97, 1.0, 1.0001, 1.5, 3.0]) * body_top
    layers = lw.stack(np.diff(bounds), start=0.0, basis="aggregate")
    whole = lw.price_layers(auto, [lw.Layer.aggregate(0.0, bounds[-1])], G)
    parts = lw.price_layers(auto, layers, G)
    for name in G:
        assert parts[parts.distortion == name].premium.sum() == pytest.approx(
            whole[whole.distortion == name].premium.iloc[0], rel=1e-12)


def test_allocation_uses_one_uniform_grid(grids):
    auto, uniform, _ = grids
    twin = auto.uniform_grid()
    assert twin.resolution() == uniform.resolution() and twin.uniform_grid() is twin
    assert auto.uniform_grid() is twin  # kept on the model
    np.testing.assert_array_equal(twin.annual().values, uniform.annual().values)


# ----------------------------------------------------------------------------- thinned counts
def brute_thinned_cdf(freq, p, kmax):
    """P(N' <= k) for N' = sum of N Bernoulli(p) marks, by summing over N (independent of the engine)."""
    n = np.arange(0, 400)
    pn = freq.pmf(n)
    k = np.arange(kmax + 1)
    return np.array([np.sum(pn * stats.binom.cdf(j, n, p)) for j in k])


@pytest.mark.parametrize("freq", [lw.poisson(5.0), lw.negative_binomial(5.0, contagion=0.4), lw.binomial(30, 0.2),
                                  lw.fixed_count(7)], ids=lambda f: type(f).__name__)
@pytest.mark.parametrize("p", [0.9, 0.3, 0.01])
def test_thinned_count_quantiles_match_the_mixture(freq, p):
    # Thinning a Poisson, negative binomial or binomial count keeps its family with the mean times p
    # (Klugman, Panjer & Willmot, Loss Models: From Data to Decisions, the section on the effect of
    # a deductible on claim frequency; from memory). Checked against the mixture summed directly.
    cdf = brute_thinned_cdf(freq, p, 60)
    for q in (0.5, 0.99, 1 - 1e-9):
        want = int(np.searchsorted(cdf, q - 1e-13))
        assert freq.thinned_ppf(q, p) == want, (q, freq.thinned_ppf(q, p), want)
    assert freq.thinned_ppf(0.99, 0.0) == 0.0


def test_occurrence_grids_follow_the_claims_that_reach_the_layer():
    model = lw.FrequencySeverity(lw.poisson(5.0), SEV)
    low_h, low_n = model.grid(1 * M, 1 * M)
    high_h, high_n = model.grid(75 * M, 25 * M)
    assert high_n < low_n  # a rarely reached layer needs fewer limits' worth of grid
    # both hold (far quantile of the claims reaching the layer + 1) limits with at least 128 buckets each
    for (a, l), (h, n) in (((1 * M, 1 * M), (low_h, low_n)), ((75 * M, 25 * M), (high_h, high_n))):
        k = lw.poisson(5.0).thinned_ppf(1 - 1e-12, float(SEV.sf(a)))
        assert n * h >= (k + 1) * l and l / h >= 128
        u = model.annual(a, l)
        assert u.beyond < 1e-11
    # the priced layer agrees with the grid the full claim count would have needed
    ref_n = 2 ** math.ceil(math.log2(512 * (lw.poisson(5.0).ppf(1 - 1e-12)) + 1))
    m_buckets = ref_n // int(lw.poisson(5.0).ppf(1 - 1e-12) + 1)
    ref = lw.FrequencySeverity(lw.poisson(5.0), SEV, bucket=25 * M / m_buckets, grid_length=ref_n)
    lay = [lw.Layer.occurrence(75 * M, 25 * M, reinstatements=2)]
    got, want = lw.price_layers(model, lay, G), lw.price_layers(ref, lay, G)
    np.testing.assert_allclose(got["premium"], want["premium"], rtol=1e-5)


def test_error_estimate_grid_at_half_length_is_the_merged_severity():
    """The discretisation-error estimate merges odd severity atoms into their neighbours; every atom is
    then on the grid of twice the bucket, where it is transformed at half the length. Same distribution as
    transforming the merged severity at full length (computed here with fourier.aggregate directly)."""
    from layerwise.engine.fourier import aggregate, discretise

    model = lw.FrequencySeverity(lw.poisson(5.0), SEV)
    a, l = 2 * M, 3 * M
    h, n = model.grid(a, l)
    m = int(round(l / h))
    assert m % 2 == 0  # occurrence grids hold an even number of buckets per limit
    probs, _ = discretise(SEV.sf, h, n, a, l)
    merged = probs.copy()
    odd = np.arange(1, m, 2)
    merged[odd - 1] += 0.5 * probs[odd]
    merged[odd + 1] += 0.5 * probs[odd]
    merged[odd] = 0.0
    agg, beyond = aggregate(lw.poisson(5.0).pgf, merged, 0.0, model.padding)
    xs = np.arange(0, n, 2) * h
    above = np.append(np.cumsum(agg[::-1])[::-1][1:], 0.0) + beyond  # P(X > k h), summed from the top
    want = above[::2]  # on the coarse lattice (odd atoms are zero)
    got = model.annual_coarse(a, l).survival(xs)
    # equal up to the transforms' round-off: a few 1e-17 of tilted probability, which the untilt amplifies by
    # up to e^(TILT / padding) = e^10 at the top of the grid (1.1e-13 seen on an AVX-512 machine's FFT kernels)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=20 * 1e-17 * math.exp(20.0 / model.padding))
    assert got.size > 100 and (want > 1e-6).sum() > 50


def test_a_tower_below_the_body_reads_the_body_alone():
    """price_layers asks only for what its layers read: below the body's top the coarse grid is not computed,
    and the prices equal those read from the whole distribution (the same atoms and survival below the top)."""
    model = lw.FrequencySeverity(FREQ, SEV)
    body_top = model.resolution()[1][0]
    layers = lw.stack([5 * M, 10 * M, 20 * M], start=5 * M, basis="aggregate")
    low = lw.price_layers(model, layers, G)
    keys = set(model._cache._items)
    assert ("body", 0.0, math.inf) in keys and (0.0, math.inf) not in keys
    whole = model.annual()
    body = model.annual(below=body_top)
    n = body.size - 1  # the body's atoms below its top
    np.testing.assert_array_equal(whole.values[:n], body.values[:n])
    np.testing.assert_array_equal(whole.sf[:n], body.sf[:n])
    assert body.top == body_top and body.beyond == pytest.approx(whole.survival_left(body_top), rel=1e-12)
    with_unlimited = lw.price_layers(model, list(layers) + [lw.Layer.aggregate(40 * M, math.inf)], G)
    with_unlimited = with_unlimited[with_unlimited.layer != with_unlimited.layer.iloc[3]]
    for col in ("expected_loss", "premium", "std"):
        np.testing.assert_allclose(low[col].to_numpy(), with_unlimited[col].to_numpy(), rtol=1e-12)


# ----------------------------------------------------------------------------- fast lognormal paths
def test_lognormal_fast_paths_equal_scipy():
    """The lognormal's own survival and quantiles (scalar and array) are scipy's numbers bit for bit."""
    sev = lw.lognormal(mean=M, cv=2.5)
    ref = sev.dist  # scipy's frozen lognorm with the same parameters
    xs = np.concatenate([[0.0, -1.0], np.geomspace(1e-3, 1e12, 400)])
    np.testing.assert_array_equal(sev.sf(xs), ref.sf(xs))
    assert all(sev.sf(float(x)) == ref.sf(x) for x in xs[::7])
    q = np.array([0.0, 1e-300, 1e-12, 1e-4, 0.01, 0.5, 0.9, 0.999999, 1.0])
    np.testing.assert_array_equal(sev.ppf(q), ref.ppf(q))
    np.testing.assert_array_equal(sev.isf(q), ref.isf(q))
    assert np.isnan(sev.ppf(1.5)) and np.isnan(sev.isf(-0.1))
    for m, cv in ((1.0, 0.1), (M, 2.5), (3e8, 12.0)):
        s = lw.lognormal(mean=m, cv=cv)
        assert s.mean == float(s.dist.mean()) and s.variance == float(s.dist.var())
        assert s.mean == pytest.approx(m, rel=1e-12) and math.sqrt(s.variance) / s.mean == pytest.approx(cv, rel=1e-10)


def test_grids_that_are_not_split_have_one_distribution_per_terms():
    """Reading below some loss changes nothing for a grid that is not split: one cached entry, as before."""
    model = lw.FrequencySeverity(FREQ, SEV)
    lw.price_layers(model, [lw.Layer.occurrence(2 * M, 3 * M, reinstatements=2)], G)
    keys = set(model._cache._items)
    assert keys == {(2 * M, 3 * M), ("coarse", 2 * M, 3 * M)}
    assert model.annual(2 * M, 3 * M, below=1.0) is model.annual(2 * M, 3 * M)


def test_a_layer_alone_and_in_a_taller_tower_differ_only_by_round_off():
    """Sums start at the highest layer priced, so a layer alone and under an unlimited layer agree to
    round-off (the README's guarantee: below 1e-10 relative; checked here at 1e-9)."""
    rng = np.random.default_rng(5)
    models_ = [lw.FrequencySeverity(FREQ, SEV), lw.FrequencySeverity(lw.poisson(0.5), lw.pareto(1.5, M)),
               lw.YearLossTable(rng.lognormal(14, 2, 50_000))]
    for m in models_:
        for a, l in [(5 * M, 5 * M), (95 * M, 20 * M), (300 * M, 100 * M)]:
            alone = lw.price_layers(m, [lw.Layer.aggregate(a, l)], G)
            tall = lw.price_layers(m, [lw.Layer.aggregate(a, l), lw.Layer.aggregate(a + l, math.inf)], G)
            tall = tall[tall.layer == tall.layer.iloc[0]]
            for col in ("expected_loss", "premium", "std"):
                np.testing.assert_allclose(alone[col].to_numpy(), tall[col].to_numpy(), rtol=1e-9, atol=0)
