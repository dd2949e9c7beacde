"""Value at risk and tail value at risk against closed forms.

McNeil, Frey & Embrechts, *Quantitative Risk Management* (Princeton, 2005;
2nd ed. 2015), section 2.2 (Example 2.18 in the first edition, recalled from
memory): for a normal loss, VaR_p = mu + sigma Phi^-1(p) and
TVaR_p = mu + sigma phi(Phi^-1(p)) / (1 - p). For a lognormal(mu, sigma),
VaR_p = exp(mu + sigma Phi^-1(p)) and
TVaR_p = exp(mu + sigma^2/2) Phi(sigma - Phi^-1(p)) / (1 - p) (the
partial-expectation formula of the lognormal, same source, recalled from
memory). On a sample, TVaR is the average of the worst n(1 - p) outcomes,
a fraction of the next one included (Acerbi & Tasche 2002, "On the coherence
of expected shortfall", Journal of Banking & Finance 26).

The engine prices TVaR as the distortion g(s) = min(s / (1 - p), 1), which is
linear except at s = 1 - p: on a grid only the bucket holding VaR departs
from the exact integral, by at most f(VaR) h^2 / (8 (1 - p)).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

import layerwise.engine as lw

from closed_forms import lognormal_lev  # Loss Models, App. A

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

LEVELS = [0.5, 0.9, 0.99, 0.996, 0.999]


def discretised_normal(mu, sigma, h, width):
    """Atoms mu + k h with the normal mass of [x - h/2, x + h/2); the tails go to the end atoms."""
    k = np.arange(-int(width * sigma / h), int(width * sigma / h) + 1)
    x = mu + k * h
    hi = special.ndtr((x + 0.5 * h - mu) / sigma)
    lo = special.ndtr((x - 0.5 * h - mu) / sigma)
    p = hi - lo
    p[0] += lo[0]
    p[-1] += 1.0 - hi[-1]
    return x, p / p.sum()


@pytest.mark.parametrize("p", LEVELS)
def test_normal_var_and_tvar(p):
    mu, sigma, h = 50.0, 5.0, 0.01
    x, probs = discretised_normal(mu, sigma, h, width=9.5)
    model = lw.ScenarioTable(x, probs)
    dist = model.annual()
    z = special.ndtri(p)
    var = mu + sigma * z
    tvar = mu + sigma * math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi) / (1.0 - p)
    # VaR: P(X_grid <= x_k) = Phi((x_k + h/2 - mu)/sigma), so the grid's VaR is the first atom with
    # x_k + h/2 >= VaR: exactly this atom (no tolerance)
    k = math.ceil((var - 0.5 * h - mu) / h)
    assert dist.quantile(p) == pytest.approx(mu + k * h, abs=1e-9)
    # TVaR: the step survival is S at segment midpoints (composite midpoint rule on a smooth integrand)
    # except at the kink at VaR, where the midpoint rule errs by at most f(VaR) h^2 / (8 (1 - p))
    f_var = math.exp(-0.5 * z * z) / (sigma * math.sqrt(2 * math.pi))
    tol = 1.05 * f_var * h * h / (8.0 * (1.0 - p)) + 1e-12 * tvar
    assert abs(dist.tvar(p) - tvar) <= tol, (p, dist.tvar(p), tvar, tol)
    priced = lw.price_layers(model, [lw.Layer.aggregate(0.0, math.inf)], lw.TVaRDistortion(p))["premium"].iloc[0]
    assert priced == pytest.approx(dist.tvar(p), rel=1e-14)
    # atoms misplaced by half a bucket would move TVaR (a location-equivariant measure) by h / 2
    assert tol < 0.01 * 0.5 * h


@pytest.mark.parametrize("cv", [0.5, 2.0])
def test_lognormal_var_and_tvar_on_a_grid(cv):
    sigma = math.sqrt(math.log1p(cv * cv))
    mu = -0.5 * sigma * sigma  # mean 1
    model = lw.FrequencySeverity(lw.fixed_count(1), lw.lognormal(mean=1.0, cv=cv))
    h, _ = model.grid()
    dist = model.annual()
    stats = lw.layer_statistics(model, [lw.Layer.aggregate(0.0, math.inf)], LEVELS)
    for p in LEVELS:
        z = special.ndtri(p)
        var = math.exp(mu + sigma * z)
        tvar = math.exp(mu + 0.5 * sigma * sigma) * special.ndtr(sigma - z) / (1.0 - p)
        # VaR on the moment grid: the first grid point k h whose bucket average of S,
        # (E[X ^ (k+1)h] - E[X ^ kh]) / h from the closed form, is <= 1 - p: that very point
        ks = np.arange(max(math.floor(var / h) - 3, 0), math.floor(var / h) + 4)
        s_bucket = (lognormal_lev((ks + 1) * h, mu, sigma) - lognormal_lev(ks * h, mu, sigma)) / h
        expected_var = ks[np.argmax(s_bucket <= 1.0 - p + 1e-12)] * h
        assert dist.quantile(p) == pytest.approx(expected_var, rel=1e-12)
        assert abs(expected_var - var) <= h  # and that is within a bucket of the closed form
        f_var = math.exp(-0.5 * z * z) / (var * sigma * math.sqrt(2 * math.pi))
        # beyond the top the grid misses E[(X - top)+] / (1 - p) at most
        above = (math.exp(mu + 0.5 * sigma**2) - float(lognormal_lev(dist.top, mu, sigma))) / (1.0 - p)
        tol = 1.05 * f_var * h * h / (8.0 * (1.0 - p)) + 1e-9 * tvar + above
        assert abs(dist.tvar(p) - tvar) <= tol, (cv, p, dist.tvar(p), tvar, tol)
        assert stats[f"tvar_{p:g}"].iloc[0] == pytest.approx(dist.tvar(p), rel=1e-12)
        assert stats[f"var_{p:g}"].iloc[0] == pytest.approx(expected_var, rel=1e-12)


@pytest.mark.parametrize("p", [0.9, 0.99, 0.995, 0.9973, 0.5])
def test_sample_tvar_is_average_of_worst_outcomes(p):
    """Empirical TVaR (Acerbi & Tasche 2002): (sum of the k worst + (n(1-p) - k) x_(k+1)) / (n (1 - p))."""
    x = np.random.default_rng(7).lognormal(0.0, 1.0, 2000)
    x[:10] = x[10]  # ties
    n = x.size
    worst = np.sort(x)[::-1]
    m = n * (1.0 - p)
    k = int(math.floor(m + 1e-9))
    exact = (worst[:k].sum() + (m - k) * worst[k]) / m if k < n else worst.mean()
    dist = lw.YearLossTable(x).annual()
    assert dist.tvar(p) == pytest.approx(exact, rel=1e-12)
    # VaR: the smallest x with at least p of the sample at or below it, the ceil(n p)-th order statistic
    assert dist.quantile(p) == np.sort(x)[math.ceil(n * p - 1e-9) - 1]
