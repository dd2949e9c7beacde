"""The engine's fast paths against slow, independent computations of the same numbers.

* Layer integrals of a step survival function: segment sums between the query
  points (numpy's ``add.reduceat``), accumulated from the top down, against
  the same integral summed segment by segment with ``math.fsum`` (exact
  rounding), with and without blocks.
* The lognormal's layer mean integral_a^b S in closed form, against the
  limited expected values of Klugman, Panjer & Willmot, *Loss Models* (App. A)
  and against ``scipy.integrate.quad``.
* Severity discretisation: the bucket means of S from Simpson, Boole and the
  next Romberg column (Gauss-Legendre only where they disagree), against
  ``scipy.integrate.quad`` bucket by bucket.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

import layerwise.engine as lw
import layerwise.engine.distribution as distribution
from layerwise.engine.distribution import LossDistribution
from layerwise.engine import fourier
from layerwise.engine.fourier import discretise

from closed_forms import lognormal_lev, lognormal_params

GS = [lw.WangTransform(0.4), lw.ProportionalHazard(0.7), lw.TVaRDistortion(0.95), lw.DualPower(2.0), lw.CostOfCapital(0.1)]


def exact_layer(dist: LossDistribution, a: float, l: float, g) -> float:
    """integral_a^(a+l) g(S(x)) dx summed piece by piece with math.fsum: S = 1 below the first atom,
    sf[i] on [values[i], values[i + 1])."""
    lev = dist.sf if g is None else np.asarray(g(dist.sf), dtype=float)
    starts = np.concatenate([[0.0], dist.values])
    levels = np.concatenate([[1.0], lev])
    ends = np.append(dist.values, math.inf)
    b = a + l
    parts = []
    for x0, x1, s in zip(starts, ends, levels):
        lo, hi = max(x0, a), min(x1, b)
        if hi > lo and s > 0:
            parts.append(float(s) * (hi - lo))
    return math.fsum(parts)


def random_distribution(rng, n: int, with_zero: bool) -> LossDistribution:
    v = np.unique(rng.gamma(2.0, 10.0, n))
    if with_zero:
        v = np.concatenate([[0.0], v])
    p = rng.random(v.size)
    return LossDistribution.from_atoms(v, p / p.sum(), sorted_unique=True)


@pytest.mark.parametrize("n", [1, 2, 7, 300, 20_000])
@pytest.mark.parametrize("with_zero", [False, True])
def test_layer_integrals_equal_exactly_rounded_sums(n, with_zero):
    rng = np.random.default_rng(n + 7 * with_zero)
    d = random_distribution(rng, n, with_zero)
    top = d.max
    # layers below, across and above the atoms, a point layer, one unlimited, some starting below the first atom
    a = np.concatenate([rng.uniform(0.0, 1.1 * top, 6), [0.0, 0.5 * d.values[0], top, 2 * top]])
    lim = np.concatenate([rng.choice([0.5, 5.0, 40.0], 6), [math.inf, 0.25 * top + 1.0, 1.0, 3.0]])
    e, second, prices = d.layer_profile(a, lim, GS)
    scale = top + 1.0  # absolute tolerance: round-off of sums of widths up to the top
    for k in range(a.size):
        assert e[k] == pytest.approx(exact_layer(d, a[k], lim[k], None), rel=1e-13, abs=1e-14 * scale)
        for g, p in zip(GS, prices):
            assert p[k] == pytest.approx(exact_layer(d, a[k], lim[k], g), rel=1e-13, abs=1e-14 * scale)
        # the second moment 2 integral_a^b (x - a) S(x) dx, by fsum over the same pieces
        b = a[k] + lim[k]
        if math.isfinite(b):
            starts = np.concatenate([[0.0], d.values])
            ends = np.append(d.values, math.inf)
            levels = np.concatenate([[1.0], d.sf])
            parts = [s * ((min(x1, b) - a[k]) ** 2 - (max(x0, a[k]) - a[k]) ** 2)
                     for x0, x1, s in zip(starts, ends, levels) if min(x1, b) > max(x0, a[k])]
            assert second[k] == pytest.approx(math.fsum(parts), rel=1e-11, abs=1e-13 * scale**2)
    # tail integrals (no differences): integral_x^inf g(S)
    x = np.array([0.0, 0.3 * top, top, 1.5 * top])
    for g in [None] + GS:
        got = d.tail_integral(x, g)
        want = [exact_layer(d, xi, math.inf, g) for xi in x]
        np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-14 * scale)


def test_blocks_agree_with_one_pass(monkeypatch):
    """A distribution longer than a block is summed block by block: the same results up to round-off."""
    rng = np.random.default_rng(3)
    d = random_distribution(rng, 50_000, True)
    a = np.array([0.0, 3.0, 17.5, 40.0, 80.0])
    lim = np.array([5.0, 30.0, math.inf, 10.0, 1.0])
    whole = d.layer_profile(a, lim, GS)
    monkeypatch.setattr(distribution, "_BLOCK", 1000)
    monkeypatch.setattr(distribution, "_MIN_BLOCK", 500)
    blocked = d.layer_profile(a, lim, GS)
    np.testing.assert_allclose(blocked[0], whole[0], rtol=1e-13)
    np.testing.assert_allclose(blocked[1], whole[1], rtol=1e-12)
    for p, q in zip(blocked[2], whole[2]):
        np.testing.assert_allclose(p, q, rtol=1e-13)
    for k in range(a.size):
        assert blocked[2][0][k] == pytest.approx(exact_layer(d, a[k], lim[k], GS[0]), rel=1e-13)


@pytest.mark.parametrize("mean,cv", [(1e6, 2.5), (1e6, 0.3), (5e4, 8.0)])
def test_lognormal_layer_mean_closed_form(mean, cv):
    """integral_a^b S = E[X ^ b] - E[X ^ a] (Loss Models, App. A) in the body; scipy's quad in log x
    in the far tail, where the difference of limited expected values has lost its digits."""
    sev = lw.lognormal(mean=mean, cv=cv)
    mu, sigma = lognormal_params(mean, cv)
    closed = sev.fast_sf.layer_mean
    for qa, qb in [(0.0, 0.5), (0.1, 0.9), (0.5, 0.99), (0.0, 1.0)]:
        a = float(sev.ppf(qa)) if qa > 0 else 0.0
        b = float(sev.ppf(qb)) if qb < 1 else math.inf
        want = (mean if b == math.inf else float(lognormal_lev(b, mu, sigma))) - (float(lognormal_lev(a, mu, sigma)) if a > 0 else 0.0)
        assert closed(a, b) == pytest.approx(want, rel=1e-12)
    for qa in [0.999, 1 - 1e-7, 1 - 1e-12]:
        a = float(sev.ppf(qa))
        for b in [1.05 * a, 3.0 * a, math.inf]:
            assert closed(a, b) == pytest.approx(quad_in_log(sev, a, b), rel=1e-11)
    assert closed(0.0, math.inf) == pytest.approx(mean, rel=1e-14)


def quad_in_log(sev, a: float, b: float) -> float:
    """integral_a^b S(x) dx by scipy's quad after x = e^t (smooth in t; an infinite end is cut 40 sigma
    above the median, a zero one 40 sigma below)."""
    sigma = sev.fast_sf.sigma
    median = float(sev.ppf(0.5))
    lo = math.log(a) if a > 0 else math.log(median) - 40 * sigma
    hi = math.log(b) if math.isfinite(b) else math.log(median) + 40 * sigma
    return integrate.quad(lambda t: float(sev.sf(math.exp(t))) * math.exp(t), lo, hi, epsabs=0.0, epsrel=1e-13, limit=400)[0]


def test_model_diagnostics_use_the_closed_form_and_agree_with_quadrature():
    """The severity mean the grid is checked against is the same number as by quadrature."""
    sev = lw.lognormal(mean=1e6, cv=2.5)
    for a, l in [(0.0, math.inf), (1e6, 1e6), (5e6, 2e7)]:
        m = lw.FrequencySeverity(lw.poisson(5.0), sev)
        diag = m.annual(a, l).diagnostics
        assert diag["severity_mean"] == pytest.approx(quad_in_log(sev, a, a + l), rel=1e-11)
        top = diag["grid_top"]
        assert diag["severity_mean_to_top"] == pytest.approx(quad_in_log(sev, a, a + min(l, top)), rel=1e-11)


SEVERITIES = {
    "lognormal cv 2.5": lw.lognormal(mean=1e6, cv=2.5),
    "lognormal cv 0.3": lw.lognormal(mean=1e6, cv=0.3),
    "gamma shape 0.5": lw.gamma(0.5, 2e6),
    "weibull shape 0.7": lw.weibull(0.7, 1e6),
    "pareto": lw.pareto(2.5, 1.5e6),
    "exponential": lw.exponential(1e6),
}


@pytest.mark.parametrize("name", list(SEVERITIES))
@pytest.mark.parametrize("h,n,a,l", [(2e4, 4096, 0.0, math.inf), (5e3, 2048, 3.275e5, 5e6), (2.5e3, 1024, 1e6, 1e6)])
def test_discretised_bucket_means_match_quadrature(name, h, n, a, l):
    """The 'moment' discretisation makes each bucket's survival the bucket mean of S: checked against
    scipy's quad on the first 200 buckets (where S bends most) and 100 spread over the rest."""
    sev = SEVERITIES[name]
    probs, tail = discretise(sev.sf, h, n, a, l)
    m = n if not math.isfinite(l) else int(round(l / h))
    sd = 1.0 - np.cumsum(probs)[:m]
    idx = np.unique(np.concatenate([np.arange(min(m, 200)), np.linspace(0, m - 1, 100).astype(int)]))
    want = np.array([integrate.quad(lambda x: float(sev.sf(x)), a + k * h, a + (k + 1) * h, epsabs=1e-17,
                                    epsrel=1e-14, limit=200)[0] / h for k in idx])
    # Simpson is kept where S barely bends (trapezoid and midpoint within BEND_ABOVE = 1e-9 of each
    # other); its error there, measured up to 2.3e-12, is what this tolerance allows
    np.testing.assert_allclose(sd[idx], want, rtol=0, atol=1e-11)
    # the buckets where S bends are held far tighter: those Simpson is kept on because the fourth
    # differences of S (at h/2, over the bucket and each neighbour) put its error below SIMPSON_BELOW of S, and
    # those refined past Boole's rule (Romberg on eighths, or Gauss-Legendre)
    k = np.arange(m, dtype=float)
    edges, mids = sev.sf(a + np.arange(m + 1) * h), sev.sf(a + (k + 0.5) * h)
    simpson = (edges[:-1] + 4 * mids + edges[1:]) / 6
    quarters = sev.sf(a + (k[:, None] + [0.25, 0.75]) * h)
    halves = (edges[:-1] + 4 * quarters[:, 0] + 2 * mids + 4 * quarters[:, 1] + edges[1:]) / 12
    bends = np.abs(0.5 * (edges[:-1] + edges[1:]) - mids) > fourier.BEND_ABOVE
    points = np.empty(2 * m + 1)
    points[0::2], points[1::2] = edges, mids
    d4 = np.abs(np.diff(points, 4)[0::2])  # over buckets (b, b + 1), b = 0 .. m - 2
    simpson_error = np.zeros(m)
    simpson_error[:-1] = d4 / 180
    simpson_error[1:] = np.maximum(simpson_error[1:], d4 / 180)
    kept = np.flatnonzero(bends & (simpson_error <= fourier.SIMPSON_BELOW * mids))
    refined = np.flatnonzero(bends & (simpson_error > fourier.SIMPSON_BELOW * mids) & (np.abs(halves - simpson) > fourier.REFINE_ABOVE))
    bent = np.flatnonzero(bends)  # kept, Boole's rule, or refined: every one of them
    bent = bent[(bent > 0) & np.isin(bent, idx)]
    np.testing.assert_allclose(sd[bent], want[np.searchsorted(idx, bent)], rtol=0, atol=1e-13)
    if name.startswith("lognormal cv 2.5") and a == 0.0:
        assert refined.size > 50 and kept.size > 50  # both paths are exercised here


def _counting(sf):
    """``sf`` and the list of the sizes of the calls made to it, in order."""
    sizes = []

    def counted(x):
        x = np.asarray(x)
        sizes.append(x.size)
        return sf(x)

    return counted, sizes


@pytest.mark.parametrize("sev,a,l,geometric", [
    (lw.lognormal(mean=1e6, cv=2.5), 1e6, 1e6, False),  # smooth at the attachment: like any other bucket
    (lw.pareto(2.5, 1.5e6), 5e6, 5e6, False),
    (lw.from_scipy("gamma", 0.5, loc=1e6, scale=2e6), 1e6, 1e6, True),  # density infinite at the attachment
    (lw.from_scipy("weibull_min", 0.7, loc=2e6, scale=1e6), 2e6, 4e6, True),
    (lw.lognormal(mean=1e6, cv=2.5), 0.0, 1e6, True),  # ground up: always on geometric pieces
])
def test_first_bucket_of_an_excess_layer(sev, a, l, geometric):
    """An excess layer's first bucket goes through the checks every bucket does, and onto pieces shrinking
    geometrically towards the attachment only where even the Romberg column is not trusted (a density
    infinite there); a ground-up grid's first bucket always. Its mean against scipy's quad, relative."""
    counted, sizes = _counting(sev.sf)

    h = l / 500
    probs, _ = discretise(counted, h, 2048, a, l)
    pieces = 16 * (len(fourier._GEOMETRIC) - 1)
    assert (sizes[-1] == pieces) is geometric
    s0 = float(sev.sf(a))
    want = integrate.quad(lambda x: float(sev.sf(x)) / s0, a, a + h, epsabs=0, epsrel=1e-13, limit=200)[0] / h
    # the mean of S over the first bucket, relative to S(a): 1 - probs[0] loses digits when S(a) is small
    got = (probs[1:].sum() + 0.0) / s0 if s0 < 0.5 else (1.0 - probs[0]) / s0
    assert got == pytest.approx(want, rel=1e-12)


def test_first_bucket_keeps_its_geometric_pieces_when_few_buckets_may_be_refined(monkeypatch):
    """With more unsettled buckets than REFINE_MAX, the ones left to Gauss-Legendre are the sharpest;
    an excess layer's first bucket, singular at the attachment, still goes onto its geometric pieces."""
    sev = lw.from_scipy("gamma", 0.5, loc=1e6, scale=2e6)
    monkeypatch.setattr(fourier, "REFINE_MAX", 1)
    counted, sizes = _counting(sev.sf)

    h = 2e3
    probs, _ = discretise(counted, h, 2048, 1e6, 1e6)
    assert sizes[-2:] == [64, 16 * (len(fourier._GEOMETRIC) - 1)]  # one bucket on even pieces, then the first
    want = integrate.quad(lambda x: float(sev.sf(x)), 1e6, 1e6 + h, epsabs=0, epsrel=1e-13, limit=200)[0] / h
    assert 1.0 - probs[0] == pytest.approx(want, rel=1e-12)


def test_romberg_column_leaves_few_buckets_to_gauss_legendre():
    """Where Boole's rule is not trusted, one more halving settles almost every bucket of a smooth
    severity: few are left to the 64-point quadrature (which would give the same numbers, slower)."""
    sev = lw.lognormal(mean=1e6, cv=2.5)
    counted, sizes = _counting(sev.sf)

    discretise(counted, 2e4, 4096)
    m = 4096
    # in order: edges and midpoints (one call), quarters of the bent buckets, eighths of those Boole's
    # rule did not settle, Gauss-Legendre (when any bucket is left), the first bucket on geometric pieces
    assert sizes[0] == 2 * m + 1 and sizes[-1] == 16 * (len(fourier._GEOMETRIC) - 1)
    assert len(sizes) in (4, 5)
    eighths, quadrature = sizes[2], (sizes[3] if len(sizes) == 5 else 0)
    assert eighths >= 4 * 50  # the eighths were taken on dozens of buckets ...
    assert quadrature <= 64 * 16  # ... and at most 16 buckets needed Gauss-Legendre


@pytest.mark.parametrize("block", [None, 700])
def test_shared_passes_give_each_distribution_its_own_numbers(monkeypatch, block):
    """layer_profiles over several distributions (one of them a single atom, one longer than a pass)
    returns what each distribution's own layer_profile returns, bit for bit, whichever share a pass."""
    if block is not None:
        monkeypatch.setattr(distribution, "_BLOCK", block)
        monkeypatch.setattr(distribution, "_MIN_BLOCK", block // 4)
    rng = np.random.default_rng(11)
    dists = [random_distribution(rng, n, z) for n, z in [(300, True), (1, False), (2_500, False), (40, True), (9_000, True)]]
    items = []
    for d in dists:
        a = rng.uniform(0.0, d.max, 3)
        items.append((d, a, rng.choice([1.0, 8.0, math.inf], 3)))
    # between them, a distribution read only below its first atom (S = 1 there)
    low = dists[2]
    items.insert(2, (low, np.array([0.0, 0.2 * low.values[0]]), np.array([0.5 * low.values[0], 0.1 * low.values[0]])))
    shared = distribution.layer_profiles(items, GS)
    assert distribution.layer_profiles([], GS) == []
    for (d, a, lim), (e, second, prices) in zip(items, shared):
        alone = d.layer_profile(a, lim, GS)
        np.testing.assert_array_equal(e, alone[0])
        np.testing.assert_array_equal(second, alone[1])
        for p, q in zip(prices, alone[2]):
            np.testing.assert_array_equal(p, q)
        for k in range(a.size):  # and they are the right numbers
            assert prices[0][k] == pytest.approx(exact_layer(d, a[k], lim[k], GS[0]), rel=1e-13, abs=1e-14 * d.max)


def test_long_distribution_queried_only_near_its_top():
    """A distribution longer than a pass, with every query in its last block (no block edge above the
    lowest query): the same exactly rounded sums."""
    rng = np.random.default_rng(5)
    d = random_distribution(rng, 3 * distribution._BLOCK, False)
    v = d.values
    x = np.array([0.5 * (v[-7] + v[-6]), v[-3]])  # inside the last atoms' segments
    for g in [None] + GS:
        np.testing.assert_allclose(d.tail_integral(x, g), [exact_layer(d, xi, math.inf, g) for xi in x], rtol=1e-13)
    width = v[-2] - x[0]
    e, _, prices = d.layer_profile(x[:1], [width], GS)
    assert prices[1] == pytest.approx(exact_layer(d, x[0], width, GS[1]), rel=1e-13)


@pytest.mark.parametrize("agg,beyond", [
    ([0.5, 0.3, 0.2, 0.0, 0.0, 0.0], 0.0),  # atoms a prefix of the grid: sliced
    ([0.5, 0.0, 0.3, 0.0, 0.2, 0.0], 0.0),  # gaps (a lattice severity): gathered
    ([0.3, 0.0, 0.3, 0.4, 0.0, 0.0], 0.0),  # as many atoms as a prefix would hold, ending at one, with a gap
    ([0.0, 0.4, 0.5, 0.0, 0.0, 0.0], 0.1),  # nothing at 0, mass beyond the top
    ([0.4, 0.0, 0.5, 0.0, 0.0, 0.0], 0.1),
    ([0.4, 0.3, 0.2, 0.0, 0.1, 0.0], 0.0),  # a prefix, then a scattered far tail: only the tail gathered
    ([0.4, 0.3, 0.1, 0.1, 0.0, 0.0], 0.1),
])
def test_grid_distribution_matches_from_atoms(agg, beyond):
    # the transform's output turned into a distribution without validation, against the validating
    # public constructor on the same atoms
    from layerwise.engine.models import _grid_distribution

    grid, agg = np.arange(6.0) * 2.5, np.array(agg)
    got = _grid_distribution(2.5, agg, beyond, 15.0)
    keep = agg > 0
    ref = LossDistribution.from_atoms(grid[keep], agg[keep], beyond=beyond, top=15.0 if beyond > 0 else None)
    np.testing.assert_array_equal(got.values, ref.values)
    np.testing.assert_allclose(got.sf, ref.sf, rtol=1e-15, atol=0)
    assert (got.beyond, got.top) == (ref.beyond, ref.top)


def test_priced_table_from_blocks_equals_pandas_constructor(monkeypatch):
    """The priced table put together from its blocks is the frame pandas' own constructor builds from the
    same columns: labels, dtypes, values, and it takes edits like any frame."""
    from layerwise.engine import pricing

    model = lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=2e5, cv=1.5))
    tower = lw.stack([2e5, 3e5, 5e5], start=1e5, basis="occurrence", reinstatements=1)
    several = {"wang": GS[0], "ph": GS[1]}
    fast = [pricing.price_layers(model, tower, several), pricing.price_layers(model, tower[0], GS[2])]
    monkeypatch.setattr(pricing, "_from_blocks", None)
    plain = [pricing.price_layers(model, tower, several), pricing.price_layers(model, tower[0], GS[2])]
    for f, p in zip(fast, plain):
        assert list(f.columns) == list(p.columns)
        assert (f.dtypes == p.dtypes).all()
        assert f.index.equals(p.index)
        assert f.equals(p)
        f.loc[0, "premium"] = p.loc[0, "premium"] = -1.0
        f["extra"] = p["extra"] = 1.0
        assert f.equals(p)
    assert list(fast[0].columns) == ["distortion"] + pricing.COLUMNS + ["extra"]


def test_text_columns_are_not_shared_between_tables():
    """Text columns are copies of remembered arrays (the same tower priced again asks for the same
    texts): editing one table's names or warnings leaves the next table's as they should be."""
    model = lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=2e5, cv=1.5))
    tower = lw.stack([2e5, 3e5], start=1e5, basis="occurrence", reinstatements=1)
    first = lw.price_layers(model, tower, {"wang": GS[0], "ph": GS[1]})
    names = list(first["layer"])
    first.loc[0, "layer"] = "edited"
    first.loc[1, "warning"] = "edited"
    first["distortion"] = first["distortion"].str.upper()
    again = lw.price_layers(model, tower, {"wang": GS[0], "ph": GS[1]})
    assert list(again["layer"]) == names and names[0] == tower[0].describe()
    assert (again["warning"] == "").all() and list(again["distortion"]) == ["wang"] * 2 + ["ph"] * 2


def test_lognormal_sf_is_scipys_bit_for_bit():
    """The lognormal's own survival function returns scipy's lognorm.sf exactly, points at or below 0
    and NaN included, for arrays (of any shape, left unchanged), lists and scalars."""
    from scipy import stats

    sev = lw.lognormal(mean=1e6, cv=2.5)
    ref = stats.lognorm(s=sev.fast_sf.sigma, scale=sev.fast_sf.scale)
    rng = np.random.default_rng(7)
    x = np.concatenate([[-1.0, -0.0, 0.0, 1e-300, np.nan, np.inf, -np.inf, 1e300],
                        np.exp(rng.uniform(-5.0, 25.0, 2000)), np.arange(200) * 12_345.0])
    kept = x.copy()
    np.testing.assert_array_equal(sev.sf(x), ref.sf(x))
    np.testing.assert_array_equal(x, kept)
    np.testing.assert_array_equal(sev.sf(x[:12].reshape(3, 4)), ref.sf(x[:12].reshape(3, 4)))
    np.testing.assert_array_equal(sev.sf(list(x[:20])), ref.sf(x[:20]))
    for v in (-2.0, 0.0, 3e5, np.float64(2e7), np.nan, np.array(5e5), np.array(-1.0), 7):
        got, want = sev.sf(v), ref.sf(v)
        assert np.ndim(got) == 0 and (got == want or (np.isnan(got) and np.isnan(want)))


def test_edges_and_midpoints_from_half_buckets_are_the_points_themselves():
    """The discretisation evaluates S at j (h / 2), j = 0 .. 2m: the even ones are k h and the odd ones
    (k + 1/2) h exactly, so one call gives what separate calls on the edges and midpoints would."""
    rng = np.random.default_rng(11)
    for h in np.concatenate([[1.0, 0.1, 2500.0, 1953.125, 1e-200, 3e250], rng.uniform(1e-3, 1e7, 40)]):
        m = 5000
        x = np.arange(2 * m + 1, dtype=float) * (0.5 * h)
        np.testing.assert_array_equal(x[0::2], np.arange(m + 1, dtype=float) * h)
        np.testing.assert_array_equal(x[1::2], (np.arange(m, dtype=float) + 0.5) * h)


@pytest.mark.parametrize("method", ["moment", "rounding"])
def test_discretise_guards_a_survival_function_that_is_not_monotone(method):
    """Round-off can make a library's sf tick up or leave [0, 1]: the bucket levels are clipped and made
    non-increasing (the running minimum), so no probability is negative; the sf's own array is not changed."""
    base = lw.lognormal(mean=1e5, cv=1.0).sf
    kept = {}

    def wobbly(x):
        s = np.asarray(base(x), dtype=float).copy()
        s[5::7] *= 1.05 if method == "rounding" else 1.5  # upward ticks, larger than the fall between points
        s[0] = 1.0 + 1e-15  # above 1
        kept["last"] = s
        kept["copy"] = s.copy()
        return s

    probs, tail = discretise(wobbly, 2e3, 512, method=method)
    assert (probs >= 0).all() and abs(probs.sum() + tail - 1.0) < 1e-12
    assert np.array_equal(kept["last"], kept["copy"])  # the sf's result is read, never written
    if method == "rounding":  # the levels are the sf at the midpoints: the guard's result written out
        levels = np.minimum.accumulate(np.clip(kept["copy"], 0.0, 1.0))
        want = np.concatenate([[1.0 - levels[0]], levels[:-1] - levels[1:]])
        np.testing.assert_array_equal(probs, want)
        assert tail == levels[-1]
    else:  # bucket means of the ticked sf, then the running minimum: some buckets get nothing
        assert (probs[1:] == 0).sum() >= 3


def _one_by_one(freq, sev, tower, gs):
    """Each layer priced alone on a model of its own: no batch, no shared pass."""
    return pd.concat([lw.price_layers(lw.FrequencySeverity(freq, sev), [lay], gs) for lay in tower], ignore_index=True)


@pytest.mark.parametrize("freq", [lw.poisson(4.0), lw.negative_binomial(3.0, contagion=0.4), lw.binomial(6, 0.5), lw.fixed_count(3)])
@pytest.mark.parametrize("sev", [lw.lognormal(mean=1e6, cv=2.0), lw.pareto(2.2, 1e6)])
def test_per_occurrence_tower_built_together_equals_layers_built_alone(freq, sev):
    """A tower's per-occurrence layers are discretised, transformed (one 2-D transform per length) and
    turned into distributions together; every number equals the layer priced alone, bit for bit."""
    tower = lw.stack([1e6, 1e6, 3e6, 5e6, 10e6, 30e6], start=5e5, basis="occurrence", reinstatements=1)
    gs = {"wang": GS[0], "ph": GS[1], "coc": GS[4]}
    together = lw.price_layers(lw.FrequencySeverity(freq, sev), tower, gs)
    alone = _one_by_one(freq, sev, tower, gs)
    for name in gs:
        a = alone[alone.distortion == name].reset_index(drop=True)
        t = together[together.distortion == name].reset_index(drop=True)
        assert a.equals(t), name


def test_batched_builds_in_small_transforms_and_past_the_cache(monkeypatch):
    """The batch split into transforms of a few rows (or one) and a tower longer than the model's cache
    give the same numbers as one layer at a time, and every distribution is built once."""
    from layerwise.engine import models

    freq, sev = lw.poisson(3.0), lw.lognormal(mean=2e5, cv=1.5)
    tower = lw.stack([1e5 * (1 + k % 3) for k in range(40)], start=1e5, basis="occurrence")  # 80 distributions > 64 cached
    gs = {"wang": GS[0], "tvar": GS[2]}
    want = lw.price_layers(lw.FrequencySeverity(freq, sev), tower[:1], gs)
    calls = []
    original = models.discretise
    monkeypatch.setattr(models, "discretise", lambda *a, **k: calls.append(1) or original(*a, **k))
    monkeypatch.setattr(models, "BATCH_POINTS", 3 * 2**13)  # a few rows per transform, some alone
    got = lw.price_layers(lw.FrequencySeverity(freq, sev), tower, gs)
    assert len(calls) == len(tower)  # one severity discretisation per layer, none again after the cache evicts
    for name in gs:
        assert got[got.distortion == name].iloc[[0]].reset_index(drop=True).equals(want[want.distortion == name].reset_index(drop=True))
    alone = _one_by_one(freq, sev, tower[::7], gs)
    for name in gs:
        a = alone[alone.distortion == name].reset_index(drop=True)
        t = got[got.distortion == name].iloc[::7].reset_index(drop=True)
        assert a.equals(t), name


def test_aggregate_rows_against_direct_convolution():
    """Each row's compound distribution and mass beyond the grid against the sum over claim counts of the
    severity's convolution powers (numpy.convolve), a claim beyond the grid sending the year beyond;
    rows transformed together equal each alone, bit for bit."""
    from scipy import stats

    rng = np.random.default_rng(7)
    n = 64
    probs = rng.random((3, n)) ** 4
    probs[:, 0] = 0.0
    tails = np.array([0.0, 0.05, 0.3])
    probs *= ((1.0 - tails) / probs.sum(axis=1))[:, None]
    freq = lw.poisson(2.5)
    rows = fourier.aggregate_rows(freq.pgf_in_place, probs, tails)
    for p, t, (agg, beyond) in zip(probs, tails, rows):
        want = np.zeros(n)
        power = np.zeros(n)
        power[0] = 1.0  # zero claims
        for j in range(80):
            want += stats.poisson.pmf(j, 2.5) * power
            power = np.convolve(power, p)[:n]
        # the tilt damps the mass that wraps around the padded grid by e^-TILT: the method's own error
        np.testing.assert_allclose(agg, want, rtol=0, atol=math.exp(-fourier.TILT))
        assert beyond == pytest.approx(1.0 - want.sum(), abs=n * math.exp(-fourier.TILT))
        alone = fourier.aggregate(freq.pgf_in_place, p.copy(), float(t))
        assert np.array_equal(alone[0], agg) and alone[1] == beyond
