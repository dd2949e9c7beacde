"""Distorted layer prices against published closed forms.

* Wang transform: g(S) = Phi(Phi^-1(S) + lam) turns a lognormal(mu, sigma)
  into a lognormal(mu + lam sigma, sigma) and a normal(mu, sigma) into a
  normal(mu + lam sigma, sigma) (Wang 2000, "A class of distortion operators
  for pricing financial and insurance risks", Journal of Risk and Insurance
  67(1)); so a layer's Wang price is its expected loss under the shifted law.
* Proportional hazard: g(S) = S^r turns a Pareto (Lomax) of shape alpha into
  one of shape alpha r (Wang 1995, "Insurance pricing and increased limits
  ratemaking by proportional hazards transforms", Insurance: Mathematics and
  Economics 17), giving closed-form layer prices.
* Dual power with whole m: 1 - g(S) = (1 - S)^m is the distribution of the
  maximum of m independent copies, so the price is E[max of m copies]
  (exponential: theta * H_m, H_m the harmonic number; the order-statistics
  fact is textbook probability; the distortion is among those of Wang 1996,
  "Premium calculation by transforming the layer premium density", ASTIN
  Bulletin 26; both recalled from memory). Also checked by exact enumeration
  on a scenario table.

Limited expected values are those of Klugman, Panjer & Willmot, *Loss Models*
(Appendix A). Grid tolerances (FixedCount(1) models, one loss):

* Jensen: the grid holds on each bucket the average S_bar of the true S, and
  prices it at g(S_bar) instead of the bucket average of g(S). For concave g
  that is never less (so on grid-aligned layers the grid price is >= the
  exact one, checked), and by a second-order expansion the excess is
  (h^2 / 24) * integral |g''(S)| f^2 dx. Allowed twice that.
* A layer bound inside a bucket adds at most g'(S) f h^2 / 8 (see
  test_reference_limited_expected_value.py), and each check asserts that its
  tolerance is below 5% of the change a half-bucket shift of the layer makes.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate, special

import layerwise.engine as lw

from closed_forms import lognormal_params, lognormal_lev, lognormal_sf, lognormal_pdf, pareto_lev  # Loss Models, App. A
from grid_parts import grid_parts

# the checks bound the grid's errors themselves; the engine's own discretisation warnings are not under test here
pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

RTOL = 1e-9  # round-off allowance on top of the discretisation bounds
SF_ATOL = 1e-14  # average survival round-off of the Fourier grid over a layer (see the limited-expected-value tests)


# --------------------------------------------------------------------------- grid error bounds
def second_derivative(g, s, rel=1e-3):
    """g''(s) by central differences (step a fraction of the distance to 0 and 1)."""
    s = np.asarray(s, dtype=float)
    d = rel * np.minimum(s, 1.0 - s)
    d = np.maximum(d, 1e-300)
    return (np.asarray(g(s + d)) - 2.0 * np.asarray(g(s)) + np.asarray(g(s - d))) / (d * d)


def first_derivative(g, s, rel=1e-3):
    s = np.asarray(s, dtype=float)
    d = np.maximum(rel * np.minimum(s, 1.0 - s), 1e-300)
    return (np.asarray(g(s + d)) - np.asarray(g(s - d))) / (2.0 * d)


def jensen_bound(g, sf, pdf, a, b, h):
    """(h^2 / 24) * integral_a^b |g''(S(x))| f(x)^2 dx, by the trapezoid rule on 40,001 points.

    The points are spread evenly and geometrically from a (where bodies near 0
    need them); ``sf`` and ``pdf`` are vectorised.
    """
    b = min(b, 1e12)
    x = np.unique(np.concatenate([np.linspace(a, b, 20001), a + np.geomspace(1e-9 * max(b - a, 1.0), b - a, 20000)]))
    s = np.asarray(sf(x), dtype=float)
    inside = (s > 1e-100) & (s < 1.0)  # below 1e-100 nothing is left to integrate (and differences underflow)
    val = np.zeros_like(x)
    val[inside] = np.abs(second_derivative(g, s[inside])) * np.asarray(pdf(x[inside]), dtype=float) ** 2
    return h * h / 24.0 * float(np.trapezoid(val, x))


def bound_term(g, sf, pdf, x, h):
    """Largest error g'(S) f h^2 / 8 that a bound inside a bucket adds (0 on a grid point)."""
    k = x / h
    if not math.isfinite(x) or abs(k - round(k)) < 1e-9:
        return 0.0
    lo = math.floor(k) * h
    xs = np.linspace(lo, lo + h, 17)
    s = np.clip(np.asarray(sf(xs), dtype=float), 1e-300, 1.0 - 1e-16)
    slope = np.max(np.abs(first_derivative(g, s)) * np.asarray(pdf(xs), dtype=float))
    return 1.05 * slope * h * h / 8.0


def grid_tolerance(g, sf, pdf, a, l, h, exact):
    return (2.0 * jensen_bound(g, sf, pdf, a, a + l, h) + bound_term(g, sf, pdf, a, h)
            + bound_term(g, sf, pdf, a + l, h) + RTOL * exact + SF_ATOL * l)


def half_bucket_shift(g, sf, a, l, h):
    """Change of a layer price if the grid were shifted by h / 2: about h/2 (g(S(a)) - g(S(a + l)))."""
    return 0.5 * h * (float(g(float(sf(a)))) - float(g(float(sf(a + l)))))


# --------------------------------------------------------------------------- Wang
WANG_LAYERS = [(0.0, 1.0), (1.0, 1.0), (2.0, 3.0), (5.0, 5.0), (10.0, 40.0), (0.37, 1.23), (3.14159, 2.71828)]


@pytest.mark.parametrize("cv", [1.0, 2.0])
@pytest.mark.parametrize("lam", [0.25, 0.5, 1.0])
def test_wang_of_lognormal_is_shifted_lognormal(cv, lam):
    mu, sigma = lognormal_params(1.0, cv)
    sev = lw.lognormal(mean=1.0, cv=cv)
    model = lw.FrequencySeverity(lw.fixed_count(1), sev)
    h, _ = model.grid()
    g = lw.WangTransform(lam)
    layers = [lw.Layer.aggregate(a, l) for a, l in WANG_LAYERS]
    table = lw.price_layers(model, layers, g)
    sf = lambda x: lognormal_sf(x, mu, sigma)  # noqa: E731
    pdf = lambda x: lognormal_pdf(x, mu, sigma)  # noqa: E731
    for i, (a, l) in enumerate(WANG_LAYERS):
        # Wang (2000): the distorted survival Phi(Phi^-1(S) + lam) is the lognormal's with mu + lam sigma
        exact = float(lognormal_lev(a + l, mu + lam * sigma, sigma) - lognormal_lev(a, mu + lam * sigma, sigma))
        got = table["premium"].iloc[i]
        tol = grid_tolerance(g, sf, pdf, a, l, h, exact)
        assert abs(got - exact) <= tol, (cv, lam, a, l, got, exact, tol)
        assert tol < 0.05 * half_bucket_shift(g, sf, a, l, h), (a, l, tol)
        if abs(a / h - round(a / h)) < 1e-9 and abs((a + l) / h - round((a + l) / h)) < 1e-9:
            assert got >= exact * (1.0 - RTOL)  # Jensen: concave g on bucket averages never prices below


def test_wang_price_equals_expected_loss_under_the_shifted_lognormal_model():
    """Two engine models: Wang price of a layer on lognormal(mu, sigma) = its EL on lognormal(mu + lam sigma, sigma)."""
    mu, sigma, lam = 0.0, 0.8, 0.6
    layers = [lw.Layer.aggregate(a, l) for a, l in [(0.0, 1.0), (1.0, 2.0), (3.0, 7.0), (10.0, 90.0)]]
    base = lw.FrequencySeverity(lw.fixed_count(1), lw.lognormal(mu=mu, sigma=sigma), bucket=0.001, grid_length=2**17)
    shifted = lw.FrequencySeverity(lw.fixed_count(1), lw.lognormal(mu=mu + lam * sigma, sigma=sigma), bucket=0.001,
                                   grid_length=2**17)
    wang = lw.price_layers(base, layers, lw.WangTransform(lam))["premium"].to_numpy()
    el = lw.price_layers(shifted, layers, lw.WangTransform(0.0))["expected_loss"].to_numpy()
    # both equal the closed form up to the Jensen excess of the Wang grid, here below 2e-7 relative
    # (h = 0.001 on a body of scale exp(mu) = 1); the EL grid is exact on grid-aligned layers
    np.testing.assert_allclose(wang, el, rtol=2e-7)
    assert np.all(wang >= el * (1 - RTOL))


def discretised_normal(mu, sigma, h, width=12.0):
    """Atoms mu + k h (|k h| <= width sigma) with the normal probability of [x - h/2, x + h/2), tails on the end atoms.

    The step survival on [x_k, x_k+1) is then the normal's S at the segment's
    midpoint, so any price is the composite midpoint rule of g(S(x)), whose
    h^2 error term (h^2/24) [d/dx g(S)] over the whole line vanishes.
    """
    k = np.arange(-int(width * sigma / h), int(width * sigma / h) + 1)
    x = mu + k * h
    cdf_hi = special.ndtr((x + 0.5 * h - mu) / sigma)
    cdf_lo = special.ndtr((x - 0.5 * h - mu) / sigma)
    p = cdf_hi - cdf_lo
    p[0] += cdf_lo[0]
    p[-1] += 1.0 - cdf_hi[-1]
    return x, p / p.sum()


@pytest.mark.parametrize("lam", [0.1, 0.5, 1.5])
def test_wang_of_normal_is_mean_plus_lambda_sigma(lam):
    mu, sigma = 100.0, 10.0  # support >= mu - 12 sigma = -20 would be negative: the atoms start at mu - 9.5 sigma
    x, p = discretised_normal(mu, sigma, h=0.02, width=9.5)
    model = lw.ScenarioTable(x, p)
    price = lw.price_layers(model, [lw.Layer.aggregate(0.0, math.inf)], lw.WangTransform(lam))["premium"].iloc[0]
    # Wang (2000): the normal's Wang price is mu + lam sigma. The discrete version is the midpoint rule
    # (exact to high order) less the normal mass cut below mu - 9.5 sigma (Phi(-9.5) ~ 1e-21): 1e-10 relative
    assert price == pytest.approx(mu + lam * sigma, rel=1e-10)


def test_wang_of_normal_sample_within_monte_carlo_error():
    """Empirical Wang price of 10^6 normal draws against mu + lam sigma, within 5 standard errors.

    Standard error from the influence function of the distortion price
    rho(F) = integral g(S(x)) dx: IF(x0) = integral g'(S(x)) (1{x < x0} - S(x)) dx
    (the L-statistic influence function, Serfling 1980, *Approximation
    Theorems of Mathematical Statistics*, ch. 8, recalled from memory). For
    the normal and Wang, g'(S) = exp(lam z - lam^2/2) with z = (x - mu)/sigma,
    and integrating by parts gives IF = sigma (exp(lam z0 - lam^2/2) - 1)/lam,
    so Var(IF) = sigma^2 (exp(lam^2) - 1)/lam^2 (-> sigma^2 as lam -> 0, the mean's).
    """
    mu, sigma, lam, n = 100.0, 10.0, 0.5, 1_000_000
    x = np.random.default_rng(20240611).normal(mu, sigma, n)
    assert x.min() > 0
    se = sigma * math.sqrt(math.expm1(lam * lam) / lam**2) / math.sqrt(n)
    got = lw.LossDistribution.from_sample(x).price(lw.WangTransform(lam))
    assert abs(got - (mu + lam * sigma)) <= 5.0 * se, (got, mu + lam * sigma, se)
    # the same through a year loss table and price_layers
    table = lw.price_layers(lw.YearLossTable(x), [lw.Layer.aggregate(0.0, math.inf)], lw.WangTransform(lam))
    assert table["premium"].iloc[0] == pytest.approx(got, rel=1e-12)


# --------------------------------------------------------------------------- proportional hazard
PH_LAYERS = [(0.0, 5.0), (5.0, 5.0), (10.0, 40.0), (50.0, 50.0), (100.0, 900.0), (3.3, 7.7), (123.45, 543.21)]


@pytest.mark.parametrize("alpha, r", [(3.0, 0.8), (2.5, 0.6), (2.0, 0.5), (1.5, 0.9), (4.0, 0.2)])
def test_proportional_hazard_of_pareto_is_pareto(alpha, r):
    theta = 10.0
    sev = lw.pareto(alpha, theta)
    model = lw.FrequencySeverity(lw.fixed_count(1), sev)
    h, _ = model.grid()
    g = lw.ProportionalHazard(r)
    table = lw.price_layers(model, [lw.Layer.aggregate(a, l) for a, l in PH_LAYERS], g)
    sf = lambda x: (theta / (np.asarray(x) + theta)) ** alpha  # noqa: E731
    pdf = lambda x: alpha * theta**alpha / (np.asarray(x) + theta) ** (alpha + 1)  # noqa: E731
    for i, (a, l) in enumerate(PH_LAYERS):
        # Wang (1995): S^r = (theta / (x + theta))^(alpha r), a Pareto of shape alpha r (alpha r = 1: log form)
        exact = float(pareto_lev(a + l, alpha * r, theta) - pareto_lev(a, alpha * r, theta))
        got = table["premium"].iloc[i]
        parts = grid_parts(model, a, a + l)  # each part of the layer at the bucket the grid has there
        tol = sum(grid_tolerance(g, sf, pdf, lo, hi - lo, hb, exact) for lo, hi, hb in parts)
        assert abs(got - exact) <= tol, (alpha, r, a, l, got, exact, tol)
        assert tol < 0.05 * sum(half_bucket_shift(g, sf, lo, hi - lo, hb) for lo, hi, hb in parts), (a, l, tol)


def test_proportional_hazard_price_of_the_whole_pareto():
    """Unlimited PH price: theta / (alpha r - 1) for alpha r > 1 (Wang 1995), less what lies above the grid top."""
    alpha, theta, r = 4.0, 10.0, 0.75
    model = lw.FrequencySeverity(lw.fixed_count(1), lw.pareto(alpha, theta))
    dist = model.annual()
    got = dist.price(lw.ProportionalHazard(r))
    exact = theta / (alpha * r - 1.0)
    above_top = float(pareto_lev(np.inf, alpha * r, theta) - pareto_lev(dist.top, alpha * r, theta))
    assert math.isfinite(dist.top) and dist.beyond > 0  # the grid stops short of the Pareto's tail
    sf = lambda x: (theta / (np.asarray(x) + theta)) ** alpha  # noqa: E731
    pdf = lambda x: alpha * theta**alpha / (np.asarray(x) + theta) ** (alpha + 1)  # noqa: E731
    jensen = sum(jensen_bound(lw.ProportionalHazard(r), sf, pdf, lo, hi, hb) for lo, hi, hb in grid_parts(model, 0.0, dist.top))
    tol = 2.0 * jensen + above_top + RTOL * exact
    assert abs(got - exact) <= tol, (got, exact, tol)


# --------------------------------------------------------------------------- dual power
def harmonic(m):
    return sum(1.0 / j for j in range(1, m + 1))


def expected_layer_of_max_exponential(a, l, theta, m):
    """E[min(max(M - a, 0), l)], M the max of m exponentials: integral_a^(a+l) 1 - (1 - e^(-x/theta))^m dx.

    Expanding (1 - u)^m binomially: sum_j C(m, j) (-1)^(j+1) theta/j (e^(-j a/theta) - e^(-j (a+l)/theta)).
    """
    return sum(math.comb(m, j) * (-1) ** (j + 1) * theta / j * (math.exp(-j * a / theta) - math.exp(-j * (a + l) / theta))
               for j in range(1, m + 1))


@pytest.mark.parametrize("m", [1, 2, 3, 5])
def test_dual_power_is_expected_maximum_of_exponentials(m):
    theta = 2.0
    sev = lw.exponential(theta)
    model = lw.FrequencySeverity(lw.fixed_count(1), sev)
    h, _ = model.grid()
    g = lw.DualPower(m)
    dist = model.annual()
    sf = lambda x: np.exp(-np.asarray(x) / theta)  # noqa: E731
    pdf = lambda x: np.exp(-np.asarray(x) / theta) / theta  # noqa: E731
    # whole variable: E[max of m] = theta H_m, less m theta e^(-end/theta) at most above the last atom.
    # Here the Jensen estimate is exact to leading order: (h^2/24) int m(m-1)(1-S)^(m-2) f^2 dx
    # = h^2 / (24 theta) for every m (substitute f = S/theta, dx = theta dS/S: m(m-1) B(2, m-1) = 1),
    # which is the excess the grid shows (8.3e-6 with h = 0.02).
    end = min(dist.top, dist.max)
    whole = dist.price(g)
    tol = 2.0 * jensen_bound(g, sf, pdf, 0.0, end, h) + m * theta * math.exp(-end / theta) + RTOL * whole
    assert abs(whole - theta * harmonic(m)) <= tol, (m, whole, theta * harmonic(m), tol)
    layers = [(0.0, 1.0), (1.0, 2.0), (3.0, 7.0), (0.7, 2.45), (10.0, 20.0)]
    got = lw.price_layers(model, [lw.Layer.aggregate(a, l) for a, l in layers], g)["premium"].to_numpy()
    for i, (a, l) in enumerate(layers):
        exact = expected_layer_of_max_exponential(a, l, theta, m)
        tol = grid_tolerance(g, sf, pdf, a, l, h, exact)
        assert abs(got[i] - exact) <= tol, (m, a, l, got[i], exact, tol)
        assert tol < 0.05 * half_bucket_shift(g, sf, a, l, h)


def test_dual_power_by_exact_enumeration_on_a_scenario_table():
    """E[layer(max of m draws)] by enumerating every m-tuple of outcomes, with ties and a zero outcome."""
    outcomes = np.array([0.0, 1.0, 2.0, 5.0, 5.0, 10.0, 2.5])
    probs = np.array([0.3, 0.2, 0.15, 0.1, 0.05, 0.05, 0.15])
    model = lw.ScenarioTable(outcomes, probs)
    layers = [(0.0, math.inf), (0.0, 1.0), (1.0, 1.5), (2.0, 3.0), (2.5, 2.5), (4.0, 100.0), (5.0, 5.0), (0.5, 0.25)]
    for m in (1, 2, 3, 4):
        table = lw.price_layers(model, [lw.Layer.aggregate(a, l) for a, l in layers], lw.DualPower(m))
        for i, (a, l) in enumerate(layers):
            exact = 0.0
            for combo in itertools.product(range(outcomes.size), repeat=m):
                top = max(outcomes[list(combo)])
                exact += np.prod(probs[list(combo)]) * min(max(top - a, 0.0), l)
            # exact arithmetic up to float round-off of sums of at most 7^4 terms
            assert table["premium"].iloc[i] == pytest.approx(exact, rel=1e-12, abs=1e-14), (m, a, l)
