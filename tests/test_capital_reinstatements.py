"""Per-occurrence layers with paid reinstatements (engine.reinstatements).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# Invented simulated events: 3000 years, Poisson(1.5) events a year, Pareto-tailed losses.
rng = np.random.default_rng(2024)
N_YEARS = 3000
COUNTS = rng.poisson(1.5, size=N_YEARS)
YEARS = np.repeat(np.arange(1, N_YEARS + 1), COUNTS)
LOSSES = (rng.pareto(2.2, size=YEARS.size) + 1.0) * 4.0
YET = lw.YearEventTable(YEARS, LOSSES, n_years=N_YEARS)


def annual_layer_loss(a, l, n):
    """L per year = min(sum of min(max(x - a, 0), l), (1 + n) l), by a pandas groupby (years without events: 0)."""
    pay = np.clip(LOSSES - a, 0.0, l)
    per_year = pd.Series(pay).groupby(YEARS).sum().reindex(np.arange(1, N_YEARS + 1), fill_value=0.0)
    return np.minimum(per_year.to_numpy(), (1 + n) * l)


def bands(L, l, n):
    """B_k = min(max(L - (k - 1) l, 0), l), k = 1..n: limit used in band k, shape (years, n)."""
    return np.column_stack([np.clip(L - (k - 1) * l, 0.0, l) for k in range(1, n + 1)])


def ref_rho(values, gfun):
    """rho_g of equally likely values (any sign): sum_j y_(j) [g(P(Y >= y_(j))) - g(P(Y > y_(j)))],
    ties merged (Wang 1996, "Premium calculation by transforming the layer premium density", ASTIN Bulletin 26)."""
    y, counts = np.unique(values, return_counts=True)
    n = values.size
    gt = (n - np.cumsum(counts)) / n
    ge = gt + counts / n
    return float(np.sum(y * (gfun(ge) - gfun(gt))))


def test_zero_rates_give_the_plain_layer_price():
    # Free reinstatements: the layer is just l xs a with aggregate limit (1 + n) l (common practice, no source).
    g = lw.WangTransform(0.35)
    for n in (0, 1, 3):
        res = lw.price_with_reinstatements(YET, 10.0, 15.0, [0.0] * n, g)
        plain = lw.price_layer(YET, lw.Layer.occurrence(10.0, 15.0, reinstatements=n), g)
        assert res.upfront_premium == pytest.approx(plain["premium"], rel=1e-13)
        assert res.expected_reinstatement_premium == 0.0
        assert res.expected_loss == pytest.approx(plain["expected_loss"], rel=1e-13)


@pytest.mark.parametrize("a, l, rates, method", [
    (8.0, 12.0, [1.0], "comonotonic"),
    (8.0, 12.0, [1.0, 0.5], "comonotonic"),
    (8.0, 12.0, [1.0, 1.0, 1.0], "comonotonic"),
    (8.0, 12.0, [3.0, 2.0], "comonotonic"),
    (2.0, 3.0, [4.0], "net loss root"),  # P * 4 > l: the net loss is not monotone
])
def test_expected_value_principle_matches_the_classical_formula(a, l, rates, method):
    # With g(s) = s the upfront premium is P = E[L] / (1 + sum_k c_k E[B_k] / l) (Sundt 1991, "On excess
    # of loss reinsurance with reinstatements", Bulletin of the Swiss Association of Actuaries; Mata 2000,
    # "Pricing excess of loss reinsurance with reinstatements", ASTIN Bulletin 30). Expectation is linear,
    # so this holds whichever route the engine takes, including rates above 100%.
    n = len(rates)
    L = annual_layer_loss(a, l, n)
    b = bands(L, l, n)
    expected = L.mean() / (1.0 + np.sum(np.asarray(rates) * b.mean(axis=0)) / l)
    res = lw.price_with_reinstatements(YET, a, l, rates, lw.ProportionalHazard(1.0))
    assert res.method == method
    assert res.upfront_premium == pytest.approx(expected, rel=1e-12)
    eh = np.sum(np.asarray(rates) * b.mean(axis=0)) / l
    assert res.expected_reinstatement_premium == pytest.approx(expected * eh, rel=1e-12)
    assert res.total_expected_premium == pytest.approx(L.mean(), rel=1e-12)  # fair on expectation
    assert res.loss_ratio == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("r", [0.5, 0.8])
def test_distorted_premium_is_a_fixed_point(r):
    # rho_g(L - P h(L)) = P, checked on the net loss built year by year (definition of the fair upfront premium).
    a, l, rates = 10.0, 15.0, np.array([1.0, 0.5])
    gfun = lambda s: s**r  # noqa: E731 - PH, Wang 1995 (Insurance: Mathematics and Economics 17)
    res = lw.price_with_reinstatements(YET, a, l, rates, lw.ProportionalHazard(r))
    assert res.method == "comonotonic" and res.monotone
    L = annual_layer_loss(a, l, 2)
    h = bands(L, l, 2) @ rates / l
    P = res.upfront_premium
    assert ref_rho(L - P * h, gfun) == pytest.approx(P, rel=1e-11)
    assert res.premium_no_reinstatement_cost == pytest.approx(ref_rho(L, gfun), rel=1e-11)
    assert res.expected_reinstatement_premium == pytest.approx(P * h.mean(), rel=1e-12)


def test_non_monotone_net_loss_is_solved_on_its_distribution():
    # A low layer with a 400% reinstatement rate: P * 4 > l, so L - P h(L) falls on band 1 and the
    # comonotonic split fails; the engine solves rho_g(L - P h(L)) = P on the net loss itself.
    a, l, rates = 2.0, 3.0, np.array([4.0])
    gfun = lambda s: s**0.6  # noqa: E731
    res = lw.price_with_reinstatements(YET, a, l, rates, lw.ProportionalHazard(0.6))
    assert res.method == "net loss root" and not res.monotone
    assert res.upfront_premium * rates.max() > l
    L = annual_layer_loss(a, l, 1)
    h = bands(L, l, 1) @ rates / l
    assert ref_rho(L - res.upfront_premium * h, gfun) == pytest.approx(res.upfront_premium, rel=1e-10)
    # the comonotonic closed form would give a different (wrong) answer here
    closed = ref_rho(L, gfun) / (1.0 + ref_rho(h, gfun))
    assert abs(closed / res.upfront_premium - 1.0) > 1e-4


def test_share_scales_every_premium():
    # rho_g(s X) = s rho_g(X) for s > 0 (positive homogeneity; Wang 1996, as above).
    g = lw.DualPower(2.0)
    full = lw.price_with_reinstatements(YET, 10.0, 15.0, [1.0], g)
    part = lw.price_with_reinstatements(YET, 10.0, 15.0, [1.0], g, share=0.25)
    assert part.upfront_premium == pytest.approx(0.25 * full.upfront_premium, rel=1e-13)
    assert part.rate_on_line == pytest.approx(full.rate_on_line, rel=1e-13)
    assert part.loss_ratio == pytest.approx(full.loss_ratio, rel=1e-13)


def test_reinstatement_factor():
    # h(L) = sum_k c_k B_k(L) / l by hand: l = 10, c = (1, 0.5); L = 15 -> 1 * 10/10 + 0.5 * 5/10 = 1.25
    h = lw.reinstatement_factor([0.0, 5.0, 15.0, 25.0, 40.0], 10.0, [1.0, 0.5])
    np.testing.assert_allclose(h, [0.0, 0.5, 1.25, 1.5, 1.5], rtol=1e-15)


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.price_with_reinstatements(YET, 10.0, 15.0, [-0.5], lw.WangTransform(0.3)), "rates"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, 15.0, [11.0], lw.WangTransform(0.3)), "rates"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, 15.0, ["one"], lw.WangTransform(0.3)), "rates"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, 0.0, [1.0], lw.WangTransform(0.3)), "limit"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, float("inf"), [1.0], lw.WangTransform(0.3)), "limit"),
        (lambda: lw.price_with_reinstatements(YET, -1.0, 15.0, [1.0], lw.WangTransform(0.3)), "attachment"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, 15.0, [1.0], lw.WangTransform(0.3), share=1.5), "share"),
        (lambda: lw.price_with_reinstatements(YET, 10.0, 15.0, [1.0], 0.3), "distortion"),
        (lambda: lw.price_with_reinstatements(LOSSES, 10.0, 15.0, [1.0], lw.WangTransform(0.3)), "model"),
        (lambda: lw.price_with_reinstatements(lw.YearLossTable([1.0, 2.0]), 0.5, 1.0, [1.0], lw.WangTransform(0.3)), "attachment"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
