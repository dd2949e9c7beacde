"""Layer expected losses of a single loss against closed-form limited expected values.

A layer (a, l) on one loss X pays min(max(X - a, 0), l), whose mean is
E[X ^ (a + l)] - E[X ^ a]. The limited expected values E[X ^ d] are written
out below from Klugman, Panjer & Willmot, *Loss Models: From Data to
Decisions* (Wiley, 4th ed. 2012), Appendix A (lognormal, Pareto). A
FrequencySeverity model with FixedCount(1) claims is that single loss.

Tolerances. The "moment" discretisation makes the grid's survival on each
bucket equal to the bucket average of the true S, so a layer whose bounds are
grid points has exactly the true expected loss (up to quadrature and summation
round-off: relative tolerance 1e-9). A bound x inside a bucket [c, c + h] adds
at most f h^2 / 8 (f the density there): the grid's survival is flat on the
bucket, the true one falls by about f h across it, and the gap integrated
from x to c + h is f u (h - u) / 2 with u = x - c, largest at u = h / 2. Every
check below also shows that its tolerance is far below the error of a layer
shifted by half a bucket, h / 2 * (S(a) - S(a + l)), so an off-by-half-bucket
grid fails it.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import layerwise.engine as lw
from layerwise.engine.fourier import discretise

from closed_forms import (  # Loss Models, App. A
    lognormal_lev, lognormal_params, lognormal_pdf, lognormal_sf, pareto_lev, pareto_pdf, pareto_sf,
)
from grid_parts import grid_parts

ON_GRID_RTOL = 1e-9  # bounds on grid points: exact up to round-off
# Fourier round-off: the transform's error (about 1e-18 of tilted probability) grows by up to e^10
# when untilted towards the grid top. Measured survival errors of these single-loss grids: below
# 1e-13 where S > 1e-6, up to 1e-11 in the far tail (S ~ 1e-10). Allowed as an average error of S
# over a layer; every layer below lies where S > 1e-9 over most of its length.
SF_ATOL = 1e-14


# --------------------------------------------------------------------------- tolerance of a layer
def between_grid_bound(x, h, pdf):
    """Largest error f h^2 / 8 that a bound x strictly inside a bucket adds (0 when x is a grid point)."""
    k = x / h
    if abs(k - round(k)) < 1e-9 or not math.isfinite(x):
        return 0.0
    lo = math.floor(k) * h
    f = float(np.max(pdf(np.linspace(lo, lo + h, 33))))
    return 1.05 * f * h * h / 8.0  # 5% for the curvature of S inside the bucket


def layer_tolerance(a, l, h, pdf, exact):
    return ON_GRID_RTOL * exact + between_grid_bound(a, h, pdf) + between_grid_bound(a + l, h, pdf) + SF_ATOL * l


def half_bucket_error(a, l, h, sf):
    """Change of a layer's expected loss when the grid is shifted by h / 2: about h/2 (S(a) - S(a + l))."""
    return 0.5 * h * (float(sf(a)) - float(sf(a + l)))


LOGNORMAL_LAYERS = [(0.0, 1.0), (1.0, 1.0), (2.0, 3.0), (5.0, 5.0), (10.0, 40.0), (50.0, 50.0),
                    (0.37, 1.23), (3.14159, 2.71828), (17.3, 61.9)]
PARETO_LAYERS = [(0.0, 5.0), (5.0, 5.0), (10.0, 40.0), (50.0, 50.0), (100.0, 900.0), (1000.0, 9000.0),
                 (3.3, 7.7), (123.45, 543.21)]


# --------------------------------------------------------------------------- checks
@pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")  # cv 0.5: top layers end past the grid top
@pytest.mark.parametrize("mean, cv", [(1.0, 0.5), (1.0, 2.0), (1.0, 5.0)])
def test_lognormal_single_loss_layers(mean, cv):
    mu, sigma = lognormal_params(mean, cv)
    model = lw.FrequencySeverity(lw.fixed_count(1), lw.lognormal(mean=mean, cv=cv))
    a = np.array([x for x, _ in LOGNORMAL_LAYERS])
    l = np.array([y for _, y in LOGNORMAL_LAYERS])
    table = lw.price_layers(model, [lw.Layer.aggregate(x, y) for x, y in LOGNORMAL_LAYERS], lw.WangTransform(0.0))
    exact = lognormal_lev(a + l, mu, sigma) - lognormal_lev(a, mu, sigma)
    top = model.annual().top
    for i, (ai, li) in enumerate(LOGNORMAL_LAYERS):
        parts = grid_parts(model, ai, ai + li)  # each part of the layer at the bucket the grid has there
        tol = sum(layer_tolerance(lo, hi - lo, hb, lambda x: lognormal_pdf(x, mu, sigma), exact[i]) for lo, hi, hb in parts)
        # a layer reaching past the grid top (cv 0.5: top 20.5) may also miss what lies beyond it:
        # the engine bounds that by grid_error (g(beyond) times the part of the layer above the top)
        tol += table["grid_error"].iloc[i]
        got = table["expected_loss"].iloc[i]
        assert abs(got - exact[i]) <= tol, (ai, li, got, exact[i], tol)
        if ai + li <= top:  # and inside the grid a half-bucket shift would be caught
            shift = sum(half_bucket_error(lo, hi - lo, hb, lambda x: lognormal_sf(x, mu, sigma)) for lo, hi, hb in parts)
            assert tol < 0.05 * shift, (ai, li, tol)


@pytest.mark.parametrize("alpha", [3.0, 2.5, 1.5, 1.0])
def test_pareto_single_loss_layers(alpha):
    theta = 10.0
    model = lw.FrequencySeverity(lw.fixed_count(1), lw.pareto(alpha, theta))
    a = np.array([x for x, _ in PARETO_LAYERS])
    l = np.array([y for _, y in PARETO_LAYERS])
    dist = model.annual()
    got = dist.layer_integral(a, l)
    exact = pareto_lev(a + l, alpha, theta) - pareto_lev(a, alpha, theta)
    for i, (ai, li) in enumerate(PARETO_LAYERS):
        assert ai + li <= dist.top  # every layer ends inside the grid: no beyond-the-top error
        parts = grid_parts(model, ai, ai + li)
        tol = sum(layer_tolerance(lo, hi - lo, hb, lambda x: pareto_pdf(x, alpha, theta), exact[i]) for lo, hi, hb in parts)
        assert abs(got[i] - exact[i]) <= tol, (alpha, ai, li, got[i], exact[i], tol)
        assert tol < 0.05 * sum(half_bucket_error(lo, hi - lo, hb, lambda x: pareto_sf(x, alpha, theta)) for lo, hi, hb in parts)


def test_grid_mean_is_the_mean_limited_at_the_top():
    """The mass beyond the top is held at the top, so the grid's mean is E[X ^ top].

    The beyond mass itself (about 1e-11 here) is 1 minus the grid's total and
    carries the transform's round-off, so it is known only to about its own
    size: tolerance 1e-9 relative plus beyond * top.
    """
    for sev, lev in [(lw.lognormal(mean=1.0, cv=2.0), lambda d: lognormal_lev(d, *lognormal_params(1.0, 2.0))),
                     (lw.pareto(2.5, 10.0), lambda d: pareto_lev(d, 2.5, 10.0))]:
        dist = lw.FrequencySeverity(lw.fixed_count(1), sev).annual()
        exact = float(lev(dist.top))
        assert abs(dist.mean() - exact) <= ON_GRID_RTOL * exact + dist.beyond * dist.top, (sev, dist.mean(), exact)
        assert dist.beyond < 1e-9  # and the grid reaches far: the mean misses little


@pytest.mark.parametrize("method", ["moment", "rounding"])
def test_distribution_built_from_the_severity_grid(method):
    """The LossDistribution of the discretised severity itself, built here, gives the same layer means.

    With "rounding" (S_d(k h) = S((k + 1/2) h), the midpoint rule on each
    bucket) a layer on grid points is off by the midpoint rule's error,
    h^2/24 * (f(a+l) - f(a)) summed: bounded below by 1/24 f h^2 at each end.
    """
    mu, sigma = lognormal_params(1.0, 2.0)
    sev = lw.lognormal(mean=1.0, cv=2.0)
    h, n = 0.05, 8192
    probs, tail = discretise(sev.sf, h, n, method=method)
    dist = lw.LossDistribution.from_atoms(np.arange(n) * h, probs, beyond=tail, top=n * h)
    model = lw.FrequencySeverity(lw.fixed_count(1), sev, bucket=h, grid_length=n, method=method)
    a = np.array([x for x, _ in LOGNORMAL_LAYERS])
    l = np.array([y for _, y in LOGNORMAL_LAYERS])
    got = dist.layer_integral(a, l)
    # the FFT of a single claim returns the same grid, up to its round-off (SF_ATOL on average over a layer)
    np.testing.assert_allclose(model.annual().layer_integral(a, l), got, rtol=1e-10, atol=SF_ATOL * l.max())
    exact = lognormal_lev(a + l, mu, sigma) - lognormal_lev(a, mu, sigma)
    pdf = lambda x: lognormal_pdf(x, mu, sigma)  # noqa: E731
    for i, (ai, li) in enumerate(LOGNORMAL_LAYERS):
        tol = layer_tolerance(ai, li, h, pdf, exact[i])
        if method == "rounding":
            # midpoint rule: error h^2/24 * max|f'| * l at most; f' of this lognormal is bounded by its
            # value near the mode, so allow h^2/24 * l * max|f'| from a fine sample of f'
            x = np.linspace(max(ai - h, 1e-9), ai + li + h, 4001)
            fprime = np.max(np.abs(np.gradient(pdf(x), x)))
            tol += 1.05 * h * h / 24.0 * li * fprime
        assert abs(got[i] - exact[i]) <= tol, (method, ai, li, got[i], exact[i], tol)
