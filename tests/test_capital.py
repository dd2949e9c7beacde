"""Capital standards and the portfolio's premium, capital and return (engine.capital).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import math

import numpy as np
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# A small discrete annual loss, invented for the tests.
OUTCOMES = np.array([0.0, 10.0, 20.0, 50.0, 100.0])
PROBS = np.array([0.5, 0.2, 0.15, 0.1, 0.05])


def scenario():
    return lw.ScenarioTable(OUTCOMES, PROBS)


def ref_layer_price(x, p, g, a, l):
    """integral_a^{a+l} g(S(t)) dt with S(t) = P(X > t) a step function, summed piece by piece.

    The distortion premium of a layer (Wang 1996, "Premium calculation by transforming the
    layer premium density", ASTIN Bulletin 26).
    """
    pts = np.unique(np.concatenate([[a, a + l], x[(x > a) & (x < a + l)]]))
    s = np.array([p[x > t].sum() for t in pts[:-1]])
    return float(np.sum(g(s) * np.diff(pts)))


def test_var_and_tvar_assets_on_atoms():
    # VaR_0.9: F(20) = 0.85 < 0.9 <= F(50) = 0.95, so the lower quantile is 50.
    # TVaR_0.9 with the atom at VaR split (Acerbi & Tasche 2002, "On the coherence of expected
    # shortfall", Journal of Banking & Finance 26):
    #   [E[X 1{X > 50}] + 50 (P(X <= 50) - 0.9)] / 0.1 = [100 * 0.05 + 50 * 0.05] / 0.1 = 75.
    dist = scenario().annual()
    assert lw.CapitalStandard.var(0.9).assets(dist) == 50.0
    assert lw.CapitalStandard.tvar(0.9).assets(dist) == pytest.approx(75.0, rel=1e-14)
    assert lw.CapitalStandard.amount(123.0).assets(dist) == 123.0
    assert lw.make_capital_standard("TVaR", 0.9) == lw.CapitalStandard("tvar", 0.9)


def test_portfolio_premium_capital_and_return_by_hand():
    # Assets a = VaR_0.9 = 50. S = 0.5 on [0,10), 0.3 on [10,20), 0.15 on [20,50).
    # E[X ∧ 50] = 10*0.5 + 10*0.3 + 30*0.15 = 12.5 (integral of S; common practice, no source).
    # PH r = 0.5: premium = 10*0.5**0.5 + 10*0.3**0.5 + 30*0.15**0.5 (Wang 1996, as above).
    res = lw.price_portfolio(scenario(), lw.ProportionalHazard(0.5), lw.CapitalStandard.var(0.9))
    prem = 10 * 0.5**0.5 + 10 * 0.3**0.5 + 30 * 0.15**0.5
    assert res.assets == 50.0
    assert res.expected_loss == pytest.approx(12.5, rel=1e-14)
    assert res.premium == pytest.approx(prem, rel=1e-14)
    assert res.capital == pytest.approx(50.0 - prem, rel=1e-14)
    assert res.return_on_capital == pytest.approx((prem - 12.5) / (50.0 - prem), rel=1e-13)
    assert res.leverage == pytest.approx(prem / (50.0 - prem), rel=1e-13)
    # default: E[(X - 50)+] = 50 * 0.05 = 2.5
    assert res.expected_default == pytest.approx(2.5, rel=1e-14)
    assert res.grid_error == 0.0


def test_portfolio_premium_on_a_frequency_severity_grid():
    # Reference premium from the grid's own atoms, integrated piece by piece (Wang 1996, as above).
    model = lw.FrequencySeverity(lw.poisson(2.0), lw.exponential(5.0))
    dist = model.annual()
    std = lw.CapitalStandard.tvar(0.95)
    res = lw.price_portfolio(model, lw.ProportionalHazard(0.7), std)
    # TVaR of the grid distribution, by the atom-split formula (Acerbi & Tasche 2002, as above)
    x, p = dist.values, dist.probs
    v = x[np.searchsorted(np.cumsum(p), 0.95 - 1e-12)]
    tvar = (np.sum(p[x > v] * x[x > v]) + v * (p[x <= v].sum() - 0.95)) / 0.05
    assert res.assets == pytest.approx(tvar, rel=1e-10)
    ref = ref_layer_price(x, p, lambda s: s**0.7, 0.0, res.assets)
    assert res.premium == pytest.approx(ref, rel=1e-10)


def test_capital_layers_slices():
    lays = lw.capital_layers(100.0, [20.0, 50.0])
    assert [(x.agg_attachment, x.agg_limit) for x in lays] == [(0.0, 20.0), (20.0, 30.0), (50.0, 50.0)]
    assert all(x.is_aggregate for x in lays)
    assert len(lw.capital_layers(100.0)) == 1


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.CapitalStandard("median", 0.5), "kind"),
        (lambda: lw.CapitalStandard("var", 1.0), "level"),
        (lambda: lw.CapitalStandard("var", 0.0), "level"),
        (lambda: lw.CapitalStandard("tvar", -0.1), "level"),
        (lambda: lw.CapitalStandard("amount", 0.0), "assets"),
        (lambda: lw.CapitalStandard("amount", math.nan), "assets"),
        (lambda: lw.CapitalStandard(3, 0.5), "kind"),
        (lambda: lw.price_portfolio("not a model", lw.WangTransform(0.3), lw.CapitalStandard.var(0.9)), "model"),
        (lambda: lw.price_portfolio(scenario(), 0.3, lw.CapitalStandard.var(0.9)), "distortion"),
        (lambda: lw.price_portfolio(scenario(), lw.WangTransform(0.3), 0.99), "standard"),
        # VaR_0.4 of this portfolio is 0: no assets at all
        (lambda: lw.price_portfolio(scenario(), lw.WangTransform(0.3), lw.CapitalStandard.var(0.4)), "level"),
        (lambda: lw.capital_layers(100.0, [50.0, 20.0]), "breaks"),
        (lambda: lw.capital_layers(100.0, [100.0]), "breaks"),
        (lambda: lw.capital_layers(-1.0), "assets"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
