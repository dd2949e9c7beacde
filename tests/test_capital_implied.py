"""Implied distortion parameters from an observed layer price (engine.calibration).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import numpy as np
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# Invented demo model and tower.
MODEL = lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=10.0, cv=1.5))
TOWER = lw.stack([20.0, 30.0, 50.0], start=20.0, basis="aggregate")
KNOWN = {"proportional_hazard": 0.6, "wang": 0.45, "dual_power": 2.5, "tvar": 0.55, "cost_of_capital": 0.2}

rng = np.random.default_rng(7)
YEARS = rng.integers(1, 2001, size=6000)
EVENTS = rng.pareto(2.5, size=6000) * 8.0
YET = lw.YearEventTable(YEARS, EVENTS, n_years=2000)


@pytest.mark.parametrize("family, value", list(KNOWN.items()))
@pytest.mark.parametrize("model, layer", [
    (MODEL, lw.Layer.aggregate(40.0, 30.0)),
    (MODEL, lw.Layer.occurrence(10.0, 20.0, reinstatements=1, share=0.4)),
    (YET, lw.Layer.occurrence(15.0, 25.0, reinstatements=2)),
])
def test_round_trip_each_family(model, layer, family, value):
    # Price with a known parameter, then imply it back from that price: 1e-8 relative
    # (common practice, no source: an implied parameter must reproduce the price it came from).
    g = lw.make_distortion(family, value)
    prem = lw.price_layer(model, layer, g)["premium"]
    res = lw.implied_parameter(model, layer, family, premium=prem)
    assert res.value == pytest.approx(value, rel=1e-8)
    assert res.premium == pytest.approx(prem, rel=1e-12)
    by_rol = lw.implied_parameter(model, layer, family, rate_on_line=prem / (layer.share * layer.limit))
    assert by_rol.value == pytest.approx(value, rel=1e-8)


def test_implied_table_and_spread():
    market = 1  # 30 xs 40, observed at a 20% rate on line (invented)
    table = lw.implied_parameters(MODEL, TOWER[market], rate_on_line=0.2)
    assert np.allclose(table["rate_on_line"], 0.2, rtol=1e-12)
    spread = lw.implied_spread(MODEL, TOWER, market, rate_on_line=0.2)
    fams = list(KNOWN)
    assert list(spread["calibrating"]) == [False, True, False]
    # on the calibrating layer every family reproduces the market premium 0.2 * 30 = 6
    assert np.allclose(spread.loc[1, fams].to_numpy(dtype=float), 6.0, rtol=1e-10)
    assert spread.loc[1, "spread"] < 1e-9
    # away from it they disagree
    assert (spread.loc[[0, 2], "spread"] > 0.1).all()
    assert spread.attrs["parameters"] == pytest.approx(dict(zip(table["family"], table["value"])), rel=1e-14)
    # A constant cost of capital does not fade in the tail (g(0+) = i / (1 + i) > 0) while TVaR's g
    # falls to 0; matched on the middle layer, it charges more for the top one (common practice, no source).
    assert spread.loc[2, "cost_of_capital"] > spread.loc[2, "tvar"]
    # premiums stay at or above expected loss in every cell
    assert (spread[fams].to_numpy() >= spread[["expected_loss"]].to_numpy() * (1 - 1e-12)).all()
    rol = lw.implied_spread(MODEL, TOWER, TOWER[1], premium=6.0, measure="rate_on_line")
    assert np.allclose(rol.loc[1, fams].to_numpy(dtype=float), 0.2, rtol=1e-10)


def test_unreachable_prices():
    layer = TOWER[1]
    el = lw.price_layer(MODEL, layer, lw.ProportionalHazard(1.0))["expected_loss"]
    with pytest.raises(InputError) as err:
        lw.implied_parameter(MODEL, layer, "wang", premium=0.9 * el)
    assert err.value.argument == "premium" and "below" in err.value.message
    with pytest.raises(InputError) as err:
        lw.implied_parameter(MODEL, layer, "wang", rate_on_line=1.05)
    assert err.value.argument == "rate_on_line" and "above" in err.value.message
    # cost of capital tops out at i = 100: P = (EL + 100 * 30) / 101 on a layer inside the support
    top = (el + 100 * 30.0) / 101
    with pytest.raises(InputError) as err:
        lw.implied_parameter(MODEL, layer, "cost_of_capital", premium=0.5 * (top + 30.0))
    assert err.value.argument == "premium" and "cost_of_capital family reaches" in err.value.message
    skipped = lw.implied_parameters(MODEL, layer, premium=0.5 * (top + 30.0), errors="skip")
    assert skipped["note"].iloc[-1] != "" and np.isnan(skipped["value"].iloc[-1])


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.implied_parameter(MODEL, TOWER[0], "wang"), "premium"),
        (lambda: lw.implied_parameter(MODEL, TOWER[0], "wang", premium=5.0, rate_on_line=0.2), "premium"),
        (lambda: lw.implied_parameter(MODEL, TOWER[0], "wang", premium=-1.0), "premium"),
        (lambda: lw.implied_parameter(MODEL, lw.Layer.aggregate(10.0, float("inf")), "wang", rate_on_line=0.1), "rate_on_line"),
        (lambda: lw.implied_parameter(MODEL, (10, 20), "wang", premium=5.0), "layer"),
        (lambda: lw.implied_parameter(MODEL, TOWER[0], "blend", premium=9.0), "family"),
        (lambda: lw.implied_spread(MODEL, TOWER, 3, premium=6.0), "market_layer"),
        (lambda: lw.implied_spread(MODEL, TOWER, 1.5, premium=6.0), "market_layer"),
        (lambda: lw.implied_spread(MODEL, TOWER, 1, premium=6.0, measure="price"), "measure"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
