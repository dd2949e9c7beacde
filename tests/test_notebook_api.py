"""Python users: engine objects print their parameters briefly; data models build from DataFrames."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.engine import InputError


# =========================================================================== reprs
@pytest.mark.parametrize(
    "obj, words",
    [
        (lw.Layer.occurrence(1e6, 5e6), ["occ_attachment=1000000.0", "occ_limit=5000000.0", "share=1.0"]),
        (lw.Layer.aggregate(2e6, 3e6, share=0.5), ["agg_attachment=2000000.0", "agg_limit=3000000.0", "share=0.5"]),
        (lw.WangTransform(0.4), ["WangTransform", "lam=0.4"]),
        (lw.ProportionalHazard(0.8), ["r=0.8"]),
        (lw.DualPower(1.5), ["m=1.5"]),
        (lw.TVaRDistortion(0.99), ["p=0.99"]),
        (lw.CostOfCapital(0.1), ["roe=0.1"]),
        (lw.Blend((lw.WangTransform(0.4), lw.TVaRDistortion(0.9)), (0.5, 0.5)), ["lam=0.4", "p=0.9", "weights=(0.5, 0.5)"]),
        (lw.TableDistortion((0, 0.5, 1), (0, 0.7, 1)), ["s=(0.0, 0.5, 1.0)", "g=(0.0, 0.7, 1.0)"]),
        (lw.lognormal(mean=2e6, cv=2.5), ["lognormal", "mean=2e+06", "cv=2.5"]),
        (lw.pareto(1.5, 1e6), ["pareto", "shape=1.5"]),
        (lw.poisson(5), ["Poisson", "mean=5"]),
        (lw.negative_binomial(5, 0.6), ["NegativeBinomial", "mean=5"]),
        (lw.binomial(10, 0.1), ["n=10", "q=0.1"]),
        (lw.fixed_count(3), ["n=3"]),
        (lw.FrequencySeverity(lw.poisson(5), lw.lognormal(mean=2e6, cv=2.5)), ["Poisson(mean=5", "lognormal(mean=2e+06", "method='moment'"]),
    ],
)
def test_engine_objects_print_their_parameters(obj, words):
    text = repr(obj)
    assert "\n" not in text and len(text) < 250, text
    for w in words:
        assert w in text, (w, text)


def test_data_models_print_a_summary_not_their_arrays():
    rng = np.random.default_rng(1)
    x = rng.gamma(2.0, 1e6, size=10_000)
    cases = [
        (lw.YearLossTable(x), "<YearLossTable: year loss table of 10,000 years>"),
        (lw.YearLossTable(x, np.ones_like(x)), "<YearLossTable: year loss table of 10,000 years, weighted>"),
        (lw.YearEventTable(np.arange(1, 10_001), x, 20_000), "<YearEventTable: year-event table of 10,000 events in 20,000 years>"),
        (lw.ScenarioTable([0.0, 1e6, 5e6], [0.7, 0.2, 0.1]), "<ScenarioTable: scenario table of 3 outcomes>"),
    ]
    for model, want in cases:
        assert repr(model) == want
        assert str(model) == want
        assert model.describe() in repr(model)


def test_long_table_distortion_prints_its_ends_only():
    s = np.linspace(0.0, 1.0, 201)
    g = lw.TableDistortion(tuple(s), tuple(np.sqrt(s)))
    text = repr(g)
    assert len(text) < 200 and "201 points" in text and "..." in text
    assert text.startswith("TableDistortion(s=(0, 0.005, 0.01, ..., 0.995, 1), g=(0, ")


def test_loss_distribution_repr_summarises():
    d = lw.YearLossTable([0.0, 1.0, 3.0]).annual()
    assert repr(d).startswith("LossDistribution(3 atoms on [0, 3], mean=1.33333")


# =========================================================================== DataFrames in
@pytest.fixture
def events():
    return pd.DataFrame({
        "year": [1, 1, 2, 4, 4, 4],
        "loss": [1e6, 3e6, 2.5e6, 4e5, 7e6, 1e6],
        "region": ["a", "b", "a", "a", "b", "b"],
    })


def test_year_loss_table_from_frame():
    df = pd.DataFrame({"sim": [1, 2, 3, 4], "annual_loss": [0.0, 2e6, 5e5, 9e6], "w": [1.0, 1.0, 2.0, 0.5]})
    m = lw.YearLossTable.from_frame(df, column="annual_loss")
    assert m == lw.YearLossTable(df["annual_loss"].to_numpy())
    mw = lw.YearLossTable.from_frame(df, column="annual_loss", weights="w")
    assert mw == lw.YearLossTable([0.0, 2e6, 5e5, 9e6], [1.0, 1.0, 2.0, 0.5])
    assert mw.mean == pytest.approx(np.average(df["annual_loss"], weights=df["w"]))
    # one-column frames and Series need no column name
    assert lw.YearLossTable.from_frame(df[["annual_loss"]]) == m
    assert lw.YearLossTable.from_frame(df["annual_loss"]) == m


def test_year_event_table_from_frame(events):
    m = lw.YearEventTable.from_frame(events, year="year", loss="loss", n_years=5)
    assert m == lw.YearEventTable(events["year"].to_numpy(), events["loss"].to_numpy(), 5)
    assert m.n_years == 5
    assert lw.YearEventTable.from_frame(events, year="year", loss="loss").n_years == 4
    # per-occurrence terms act event by event: 2m xs 1m
    layer = lw.Layer.occurrence(1e6, 2e6)
    pay = np.clip(events["loss"] - 1e6, 0, 2e6)
    assert m.layer_distribution(layer).mean() == pytest.approx(pay.sum() / 5)


def test_scenario_table_from_frame():
    df = pd.DataFrame({"outcome": [0.0, 1e6, 1e7], "prob": [0.9, 0.09, 0.01]})
    m = lw.ScenarioTable.from_frame(df, outcome="outcome", probability="prob")
    assert m == lw.ScenarioTable([0.0, 1e6, 1e7], [0.9, 0.09, 0.01])
    assert m.mean == pytest.approx(0.09 * 1e6 + 0.01 * 1e7)


def test_from_frame_errors_name_the_argument_and_column(events):
    with pytest.raises(InputError) as e:
        lw.YearEventTable.from_frame(events, year="yr", loss="loss")
    assert e.value.argument == "year" and "'yr'" in e.value.message and "'year'" in e.value.message
    with pytest.raises(InputError) as e:
        lw.YearEventTable.from_frame(events, year="year", loss="region")
    assert e.value.argument == "loss" and "'region'" in e.value.message
    with pytest.raises(InputError) as e:
        lw.YearLossTable.from_frame(events)
    assert e.value.argument == "column" and "name the column" in e.value.message
    bad = pd.DataFrame({"x": [1.0, np.nan]})
    with pytest.raises(InputError) as e:
        lw.YearLossTable.from_frame(bad, column="x")
    assert e.value.argument == "column" and "NaN" in e.value.message
    with pytest.raises(InputError) as e:
        lw.ScenarioTable.from_frame(pd.DataFrame({"o": [0.0, 1.0], "p": [0.5, 0.6]}), outcome="o", probability="p")
    assert e.value.argument == "probabilities"  # the constructor's own checks still apply
    with pytest.raises(InputError) as e:
        lw.YearLossTable.from_frame(pd.DataFrame({"a": [1.0], "b": [2.0]}), column="a", weights="c")
    assert e.value.argument == "weights"
