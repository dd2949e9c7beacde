"""Constant cost of capital: every layer that can be exhausted returns exactly the cost of capital.

With g(s) = (s + roe) / (1 + roe) for s > 0 and g(0) = 0, a layer of
aggregate limit l whose loss L can reach l has premium
P = integral_0^l g(S_L) dx = (E[L] + roe * l) / (1 + roe), that is
P - E[L] = roe * (l - P): margin = roe * capital with capital = l - P for a
fully collateralised layer (common practice, no source). A layer that cannot
be exhausted (the largest possible loss m below a + l) only charges capital on
the part it can reach: P = (E[L] + roe * (m - a)+) / (1 + roe).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import layerwise.engine as lw

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

ROES = [0.05, 0.15, 1.0]
RTOL = 1e-12  # the identity is algebraic: it holds to round-off


def _models():
    rng = np.random.default_rng(11)
    counts = rng.poisson(2.0, 5000)
    years = np.repeat(np.arange(1, 5001), counts)
    events = rng.lognormal(0.0, 1.0, years.size)
    annual = np.bincount(years - 1, weights=events, minlength=5000)
    return {
        "frequency_severity": lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=1.0, cv=1.5)),
        "year_loss_table": lw.YearLossTable(annual),
        "scenario_table": lw.ScenarioTable([0.0, 1.0, 2.5, 2.5, 4.0, 10.0], [0.4, 0.2, 0.1, 0.1, 0.15, 0.05]),
        "year_event_table": lw.YearEventTable(years, events, n_years=5000),
    }


MODELS = _models()


def _exhaustible_layers(model):
    """Aggregate layers inside the support, and for event models occurrence layers with reinstatements and shares."""
    top = model.annual().max
    out = [lw.Layer.aggregate(a, l) for a, l in [(0.0, 0.5 * top), (0.1 * top, 0.3 * top), (0.37 * top, 0.6 * top)]]
    out.append(lw.Layer.aggregate(0.2 * top, 0.5 * top, share=0.35))
    if model.occurrence_terms:
        out += [lw.Layer.occurrence(1.0, 2.0, reinstatements=0), lw.Layer.occurrence(1.0, 2.0, reinstatements=2, share=0.5),
                lw.Layer.occurrence(0.5, 1.5, agg_deductible=0.5, agg_limit=3.0)]
    return out


@pytest.mark.parametrize("roe", ROES)
@pytest.mark.parametrize("name", list(MODELS))
def test_return_on_capital_is_the_cost_of_capital(name, roe):
    model = MODELS[name]
    layers = _exhaustible_layers(model)
    table = lw.price_layers(model, layers, lw.CostOfCapital(roe))
    for i, lay in enumerate(layers):
        dist = model.layer_distribution(lay)
        assert dist.survival_left(lay.agg_limit * lay.share) > 0, lay  # the layer can be exhausted
    np.testing.assert_allclose(table["return_on_capital"], roe, rtol=RTOL)
    share = np.array([x.share for x in layers])
    agg_limit = np.array([x.agg_limit for x in layers])
    expected = (table["expected_loss"] + roe * share * agg_limit) / (1.0 + roe)
    np.testing.assert_allclose(table["premium"], expected, rtol=RTOL)
    np.testing.assert_allclose(table["capital"], share * agg_limit - table["premium"], rtol=RTOL)
    np.testing.assert_allclose(table["margin"], roe * table["capital"], rtol=1e-10)


@pytest.mark.parametrize("name", ["scenario_table", "year_loss_table", "frequency_severity"])
def test_layers_the_loss_cannot_exhaust_charge_only_what_they_can_reach(name):
    roe = 0.2
    model = MODELS[name]
    m = model.annual().max  # largest possible annual loss (a grid model: its top atom)
    layers = [lw.Layer.aggregate(0.8 * m, 0.4 * m), lw.Layer.aggregate(1.5 * m, m)]
    table = lw.price_layers(model, layers, lw.CostOfCapital(roe))
    reach = np.array([max(m - 0.8 * m, 0.0), 0.0])
    expected = (table["expected_loss"] + roe * reach) / (1.0 + roe)
    np.testing.assert_allclose(table["premium"], expected, rtol=RTOL, atol=1e-15 * m)
    assert table["return_on_capital"].iloc[0] < roe
    assert table["premium"].iloc[1] == 0.0 and table["expected_loss"].iloc[1] == 0.0
    assert table["return_on_capital"].iloc[1] == 0.0


def test_fixed_count_occurrence_layer_has_no_capital_above_its_largest_loss():
    """n claims capped at l per occurrence cannot lose more than n l a year, so capital stops there.

    (A transform round-off of a few 1e-15 above n l used to charge capital up to 2 n l.)
    """
    roe = 0.1
    for freq, cap in [(lw.fixed_count(1), 1), (lw.fixed_count(3), 3), (lw.binomial(4, 0.5), 4)]:
        model = lw.FrequencySeverity(freq, lw.lognormal(mean=1.0, cv=2.0))
        dist = model.annual(0.0, 10.0)
        assert dist.max == pytest.approx(10.0 * cap) and dist.beyond == 0.0
        row = lw.price_layer(model, lw.Layer.occurrence(0.0, 10.0), lw.CostOfCapital(roe))
        assert row["premium"] == pytest.approx((row["expected_loss"] + roe * 10.0 * cap) / (1 + roe), rel=RTOL)
