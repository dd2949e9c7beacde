"""Grid layer prices against scipy.integrate.quad of g(S(x)) on analytic survival functions.

For a single loss (a FrequencySeverity with FixedCount(1) claims) the layer
price is integral_a^(a+l) g(S(x)) dx with S the severity's survival function,
which scipy.integrate.quad evaluates to ~1e-12 from scipy.special's lognormal
and gamma survival functions. The distortions are written out here from their
definitions (not taken from the engine), for every family.

Tolerance of the grid (bucket h), summed from:

* Jensen (moment method): the grid holds the bucket average of S and prices
  g of it, off by (h^2/24) integral |g''(S)| f^2 dx to second order, taken
  twice; on the first bucket, where a density infinite at 0 (gamma shape
  0.5) or Wang's curvature (unbounded as s -> 1) break the expansion, by at
  most h (g(S_bar) - chord(S_bar)), the chord of g from S(h) to 1. Midpoint
  rule (rounding method): (h^2/24) |[d/dx g(S)] from a to a + l|, taken twice.
* Kinks of g (TVaR, tables, blends with them): a slope jump D at s* adds at
  most D f(x*) h^2 / 8 in the bucket where S(x*) = s*.
* A layer bound inside a bucket: at most g'(S) f h^2 / 8.

Half-bucket errors. Shifting the grid by h / 2 changes a layer price by about
h/2 * (g(S(a)) - g(S(a + l))); e.g. for the lognormal below (mean 1, cv 1.5,
h = 0.01) and the Wang layer 1 xs 0.5 that is 0.005 * (0.58 - 0.29) = 1.5e-3,
against a tolerance of a few 1e-6. Each case asserts its tolerance is below
5% of that shift, so a half-bucket error cannot pass.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, special

import layerwise.engine as lw

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

RTOL = 1e-9
SF_ATOL = 1e-14  # average survival round-off of the Fourier grid over a layer


# --------------------------------------------------------------------------- distortions, from their definitions
def _a(s):
    return np.asarray(s, dtype=float)


def _tvar(p):
    return lambda s: np.minimum(_a(s) / (1.0 - p), 1.0)


def _tvar_slope(p):
    return lambda s: np.where(_a(s) < 1.0 - p, 1.0 / (1.0 - p), 0.0)


def _wang(lam):
    return lambda s: special.ndtr(special.ndtri(s) + lam)


def _wang_slope(lam):
    # g'(s) = phi(w + lam) / phi(w) = exp(-lam w - lam^2 / 2), w = Phi^-1(s)
    return lambda s: np.exp(-lam * special.ndtri(s) - 0.5 * lam * lam)


def _wang_curvature(lam):
    # g''(s) = -lam g'(s) / phi(w)
    def fn(s):
        w = special.ndtri(s)
        return -lam * np.exp(-lam * w - 0.5 * lam * lam) / (np.exp(-0.5 * w * w) / math.sqrt(2 * math.pi))
    return fn


TABLE_S, TABLE_G = (0.0, 0.01, 0.1, 0.5, 1.0), (0.0, 0.05, 0.3, 0.7, 1.0)
TABLE_SLOPES = np.diff(TABLE_G) / np.diff(TABLE_S)


def _zero(s):
    return np.zeros_like(_a(s))


# name: (engine distortion, g, g', g'', [(kink s*, slope jump)])
FAMILIES = {
    "ph": (lw.ProportionalHazard(0.7), lambda s: _a(s) ** 0.7, lambda s: 0.7 * _a(s) ** -0.3,  # Wang (1995)
           lambda s: -0.21 * _a(s) ** -1.3, []),
    "wang": (lw.WangTransform(0.4), _wang(0.4), _wang_slope(0.4), _wang_curvature(0.4), []),  # Wang (2000)
    "dual_power": (lw.DualPower(2.5), lambda s: 1.0 - (1.0 - _a(s)) ** 2.5, lambda s: 2.5 * (1.0 - _a(s)) ** 1.5,
                   lambda s: -3.75 * (1.0 - _a(s)) ** 0.5, []),
    "tvar": (lw.TVaRDistortion(0.9), _tvar(0.9), _tvar_slope(0.9), _zero, [(0.1, 1.0 / 0.1)]),
    # constant cost of capital: (s + roe)/(1 + roe) for s > 0 (common practice, no source)
    "cost_of_capital": (lw.CostOfCapital(0.15), lambda s: np.where(_a(s) > 0, (_a(s) + 0.15) / 1.15, 0.0),
                        lambda s: np.full_like(_a(s), 1.0 / 1.15), _zero, []),
    "blend": (lw.Blend((lw.ProportionalHazard(0.5), lw.TVaRDistortion(0.95)), (0.6, 0.4)),
              lambda s: 0.6 * _a(s) ** 0.5 + 0.4 * _tvar(0.95)(s),
              lambda s: 0.3 * _a(s) ** -0.5 + 0.4 * _tvar_slope(0.95)(s),
              lambda s: -0.15 * _a(s) ** -1.5, [(0.05, 0.4 / 0.05)]),
    "table": (lw.TableDistortion(TABLE_S, TABLE_G), lambda s: np.interp(s, TABLE_S, TABLE_G),
              lambda s: TABLE_SLOPES[np.clip(np.searchsorted(TABLE_S, s, side="right") - 1, 0, 3)], _zero,
              list(zip(TABLE_S[1:-1], -np.diff(TABLE_SLOPES)))),
}


# --------------------------------------------------------------------------- severities, from scipy.special
def lognormal_case(mean=1.0, cv=1.5):
    sigma = math.sqrt(math.log1p(cv * cv))
    mu = math.log(mean) - 0.5 * sigma * sigma

    def sf(x):
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore"):
            return special.ndtr(-(np.log(x) - mu) / sigma)

    def pdf(x):
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.exp(-0.5 * ((np.log(x) - mu) / sigma) ** 2) / (x * sigma * math.sqrt(2 * math.pi))
        return np.where(x > 0, out, 0.0)

    def isf(q):
        return math.exp(mu + sigma * special.ndtri(1.0 - q))

    return lw.lognormal(mean=mean, cv=cv), sf, pdf, isf


def gamma_case(shape, scale):
    def sf(x):
        return special.gammaincc(shape, np.maximum(np.asarray(x, dtype=float), 0.0) / scale)

    def pdf(x):
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.exp((shape - 1.0) * np.log(x / scale) - x / scale - special.gammaln(shape)) / scale
        return np.where(x > 0, out, 0.0)

    def isf(q):
        return scale * special.gammainccinv(shape, q)

    return lw.gamma(shape=shape, scale=scale), sf, pdf, isf


SEVERITIES = {
    "lognormal": lognormal_case,
    "gamma_shape4": lambda: gamma_case(4.0, 0.25),
    "gamma_shape0.5": lambda: gamma_case(0.5, 2.0),
}
LAYERS = [(0.0, 0.5), (0.5, 1.0), (1.5, 2.5), (3.0, 4.0), (0.123, 0.456), (2.71, 3.14)]


# --------------------------------------------------------------------------- error bounds
def jensen_bound(g, g2, sf, pdf, a, b, h):
    """(h^2/24) integral |g''(S)| f^2 dx on [max(a, h), b], plus the first bucket's chord bound.

    On the first bucket S runs from 1 down to S(h), too far for the expansion
    when the density is infinite at 0 (and Wang's g'' is unbounded near 1);
    there concavity alone bounds the gap: the bucket average of g(S) is above
    the chord of g from S(h) to 1, so the gap is at most h (g(S_bar) - chord(S_bar)).
    """
    total = 0.0
    lo = a
    if a < h:
        s_h = float(sf(h))
        s_bar = integrate.quad(lambda x: float(sf(x)), 0.0, h, epsabs=1e-15, epsrel=1e-13)[0] / h
        chord = float(g(s_h)) + (s_bar - s_h) * (1.0 - float(g(s_h))) / (1.0 - s_h)
        total += h * max(float(g(s_bar)) - chord, 0.0) / 2.0  # halved: the caller doubles every smooth term
        lo = h
    if b > lo:
        x = np.unique(np.concatenate([np.linspace(lo, b, 20001), lo + np.geomspace(1e-9, b - lo, 5000)]))
        s = np.asarray(sf(x), dtype=float)
        ok = (s > 1e-100) & (s < 1.0)
        val = np.zeros_like(x)
        val[ok] = np.abs(g2(s[ok])) * np.asarray(pdf(x[ok])) ** 2
        total += h * h / 24.0 * float(np.trapezoid(val, x))
    return total


def midpoint_bound(g1, sf, pdf, a, b, h):
    """(h^2/24) (|d/dx g(S)| at a + at b): the composite midpoint rule's leading error, each end bounded."""
    def slope(x):
        s = float(sf(x))
        return 0.0 if not 0.0 < s < 1.0 else abs(float(g1(s))) * float(pdf(x))
    return h * h / 24.0 * (slope(max(a, 1e-12)) + slope(b))


def kink_bound(kinks, isf, pdf, a, b, h):
    """A slope jump D of g at s* adds at most D f(x*) h^2 / 8 in the bucket holding x* (S(x*) = s*)."""
    out = 0.0
    for s_star, jump in kinks:
        x_star = isf(s_star)
        if a - h < x_star < b + h:
            out += 1.05 * jump * float(pdf(x_star)) * h * h / 8.0
    return out


def bound_term(g1, sf, pdf, x, h):
    """A layer bound x inside a bucket adds at most g'(S) f h^2 / 8 (0 on a grid point)."""
    k = x / h
    if abs(k - round(k)) < 1e-9:
        return 0.0
    lo = math.floor(k) * h
    xs = np.linspace(lo, lo + h, 17)
    s = np.clip(np.asarray(sf(xs), dtype=float), 1e-300, 1.0)
    return 1.05 * float(np.max(np.abs(g1(s)) * np.asarray(pdf(xs)))) * h * h / 8.0


def reference_price(g, sf, isf, kinks, a, b):
    pts = sorted({isf(s) for s, _ in kinks} | {isf(q) for q in (0.9, 0.5, 0.1, 0.01)})
    pts = [p for p in pts if a < p < b]
    val, err = integrate.quad(lambda x: float(g(float(sf(x)))), a, b, points=pts or None, limit=400,
                              epsabs=1e-14, epsrel=1e-12)
    return val, err


# --------------------------------------------------------------------------- the check
CASES = [("moment", sev, fam) for sev in SEVERITIES for fam in FAMILIES] + [("rounding", "lognormal", fam) for fam in FAMILIES]


@pytest.mark.parametrize("method, severity, family", CASES)  # rounding on the lognormal only: keeps the suite short
def test_grid_prices_match_quadrature(family, severity, method):
    engine_g, g, g1, g2, kinks = FAMILIES[family]
    sev, sf, pdf, isf = SEVERITIES[severity]()
    model = lw.FrequencySeverity(lw.fixed_count(1), sev, method=method)
    h, _ = model.grid()
    # the engine's distortion is the published one (to round-off) on a spread of probabilities
    s = np.concatenate([[0.0, 1e-12, 1e-6], np.linspace(0.001, 0.999, 999), [1 - 1e-9, 1.0]])
    np.testing.assert_allclose(engine_g(s), g(s), rtol=1e-12, atol=1e-15)
    table = lw.price_layers(model, [lw.Layer.aggregate(a, l) for a, l in LAYERS], engine_g)
    top = model.annual().top
    for i, (a, l) in enumerate(LAYERS):
        b = a + l
        assert b < top
        exact, quad_err = reference_price(g, sf, isf, kinks, a, b)
        smooth = 2.0 * (jensen_bound(g, g2, sf, pdf, a, b, h) if method == "moment" else midpoint_bound(g1, sf, pdf, a, b, h))
        tol = (smooth + kink_bound(kinks, isf, pdf, a, b, h) + bound_term(g1, sf, pdf, a, h) + bound_term(g1, sf, pdf, b, h)
               + RTOL * exact + SF_ATOL * l + 10.0 * quad_err)
        got = table["premium"].iloc[i]
        assert abs(got - exact) <= tol, (family, severity, method, a, l, got, exact, tol)
        shift = 0.5 * h * (float(g(float(sf(a)))) - float(g(float(sf(b)))))
        if shift > 0:  # (TVaR prices 0.5 xs 0 at its limit exactly: flat, no shift to see)
            assert tol < 0.05 * shift, (family, severity, a, l, tol, shift)
