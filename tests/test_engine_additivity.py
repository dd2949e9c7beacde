"""Comonotonic additivity of layer prices, and subadditivity where layers are not comonotonic.

Aggregate layers (a_0, a_1), (a_1, a_2), ... of the same annual loss are
comonotonic (each is a non-decreasing function of it), and distortion prices
of comonotonic risks add up (Wang, Young & Panjer 1997, "Axiomatic
characterization of insurance prices", Insurance: Mathematics and Economics
21; Denneberg 1994, *Non-Additive Measure and Integral*, both recalled from
memory): the tower's prices must sum to the price of the one layer
(a_0, a_k) to round-off, for every distortion, whether the bounds fall on
atoms, between grid points or on tied outcomes.

Per-occurrence layers stacked on the same events are not comonotonic once
summed over a year (many small events against one large one), so only their
expected losses add; a concave distortion's price is subadditive
(same sources), so the combined layer costs at most the sum of its parts.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import layerwise.engine as lw

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

DISTORTIONS = {
    "ph": lw.ProportionalHazard(0.6),
    "wang": lw.WangTransform(0.7),
    "dual_power": lw.DualPower(3.3),
    "tvar": lw.TVaRDistortion(0.95),
    "cost_of_capital": lw.CostOfCapital(0.12),
    "blend": lw.Blend((lw.WangTransform(0.3), lw.TVaRDistortion(0.99), lw.CostOfCapital(0.05)), (0.5, 0.3, 0.2)),
    "table": lw.TableDistortion((0.0, 0.02, 0.2, 1.0), (0.0, 0.1, 0.45, 1.0)),
    "mean": lw.WangTransform(0.0),
}


def _year_event_table():
    rng = np.random.default_rng(5)
    counts = rng.poisson(4.0, 3000)
    years = np.repeat(np.arange(1, 3001), counts)
    return lw.YearEventTable(years, rng.pareto(2.5, years.size) * 3.0, n_years=3000)


def _cases():
    fs = lw.FrequencySeverity(lw.poisson(4.0), lw.lognormal(mean=1.0, cv=2.0))
    h, _ = fs.grid()
    rng = np.random.default_rng(3)
    ylt = lw.YearLossTable(rng.gamma(2.0, 5.0, 20000))
    outcomes = np.array([0.0, 3.0, 3.0, 7.5, 7.5, 7.5, 12.0, 20.0])
    scen = lw.ScenarioTable(outcomes, [0.3, 0.1, 0.1, 0.1, 0.05, 0.15, 0.1, 0.1])
    yet = _year_event_table()
    q = np.quantile(ylt.losses, [0.1, 0.5, 0.9, 0.99])
    return {
        # bounds between grid points (0.37 h, ...), on grid points, and a tower up to far in the tail
        "frequency_severity": (fs, [0.0, 0.37 * h, 1.0, 2.5 + 0.5 * h, 4.0, 7.77, 13.0, 40.0, 100.0]),
        # bounds on sample values (ties impossible in a continuous sample: use its own order statistics) and between
        "year_loss_table": (ylt, sorted([0.0, q[0], float(ylt.losses[17]), q[1], q[1] + 0.123, q[2], q[3], 200.0])),
        # bounds at tied outcomes, between them and beyond the largest
        "scenario_table": (scen, [0.0, 1.0, 3.0, 5.0, 7.5, 7.5 + 1e-9, 12.0, 20.0, 25.0]),
        "year_event_table": (yet, [0.0, 2.0, 5.0, 5.5, 10.0, 30.0]),
    }


CASES = _cases()


@pytest.mark.parametrize("family", list(DISTORTIONS))
@pytest.mark.parametrize("name", list(CASES))
def test_aggregate_tower_prices_add_up(name, family):
    model, bounds = CASES[name]
    g = DISTORTIONS[family]
    tower = lw.stack(np.diff(bounds), start=bounds[0], basis="aggregate")
    whole = lw.Layer.aggregate(bounds[0], bounds[-1] - bounds[0])
    table = lw.price_layers(model, tower + [whole], g)
    parts, total = table.iloc[:-1], table.iloc[-1]
    # one top-down sum per distribution, differenced: equal to the last bits of the total
    scale = abs(total["premium"]) + 1e-300
    assert parts["premium"].sum() == pytest.approx(total["premium"], rel=1e-12, abs=1e-15 * scale)
    assert parts["expected_loss"].sum() == pytest.approx(total["expected_loss"], rel=1e-12, abs=1e-15 * scale)
    assert np.all(parts["premium"] >= parts["expected_loss"] * (1 - 1e-12))  # concave g loads every layer


@pytest.mark.parametrize("family", list(DISTORTIONS))
def test_aggregate_tower_with_shares_adds_up_share_weighted(family):
    model, bounds = CASES["frequency_severity"]
    g = DISTORTIONS[family]
    shares = np.linspace(0.2, 1.0, len(bounds) - 1)
    tower = [lw.Layer.aggregate(a, b - a, share=s) for a, b, s in zip(bounds[:-1], bounds[1:], shares)]
    full = lw.price_layers(model, lw.stack(np.diff(bounds), start=bounds[0], basis="aggregate"), g)
    shared = lw.price_layers(model, tower, g)
    np.testing.assert_allclose(shared["premium"], shares * full["premium"], rtol=1e-13)


@pytest.mark.parametrize("family", list(DISTORTIONS))
def test_occurrence_layers_expected_losses_add_and_prices_are_subadditive(family):
    model = _year_event_table()
    g = DISTORTIONS[family]
    bounds = [0.5, 1.0, 2.0, 4.5, 10.0]
    tower = lw.stack(np.diff(bounds), start=bounds[0], basis="occurrence")
    whole = lw.Layer.occurrence(bounds[0], bounds[-1] - bounds[0])
    table = lw.price_layers(model, tower + [whole], g)
    parts, total = table.iloc[:-1], table.iloc[-1]
    # per event, min((x-a)+, l) is additive over stacked layers; summed over events and averaged, so is the mean
    assert parts["expected_loss"].sum() == pytest.approx(total["expected_loss"], rel=1e-12)
    assert total["premium"] <= parts["premium"].sum() * (1 + 1e-12)
    if family != "mean":
        # and strictly below here: some years have several events in one layer and none in another
        assert total["premium"] < parts["premium"].sum() * (1 - 1e-6)
