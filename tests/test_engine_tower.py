"""A 10-layer tower priced in one call on a compound Poisson-lognormal model and on a 100,000-year sample of it.

Sanity (common practice, no source): every layer's premium lies between its
expected loss and its largest annual loss (limit times share for a layer
without reinstatements); stacked aggregate layers add up to the layer they
make (comonotonic additivity), stacked occurrence layers add up in expected
loss. The sample must agree with the model within Monte Carlo error:
expected losses within 5 standard errors std(L) / sqrt(n), premiums within 5
standard errors from the influence function of the distortion price,
IF(x0) = integral g'(S(x)) (1{x < x0} - S(x)) dx (Serfling 1980,
*Approximation Theorems of Mathematical Statistics*, ch. 8, recalled from
memory), whose variance is estimated on the sample itself.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import layerwise.engine as lw

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")

LAMBDA, MEAN, CV = 5.0, 2e6, 2.5
N_YEARS = 100_000
G = lw.WangTransform(0.4)
OCC_LIMITS = np.array([1, 2, 2, 5, 5, 10, 10, 25, 25, 15]) * 1e6  # 1m xs 1m ... up to 101m
AGG_LIMITS = np.array([5, 5, 5, 5, 10, 10, 10, 25, 25, 50]) * 1e6  # 5m xs 5m ... up to 155m


@pytest.fixture(scope="module")
def simulated():
    rng = np.random.default_rng(31)
    counts = rng.poisson(LAMBDA, N_YEARS)
    years = np.repeat(np.arange(1, N_YEARS + 1), counts)
    sigma = math.sqrt(math.log1p(CV * CV))
    losses = rng.lognormal(math.log(MEAN) - 0.5 * sigma * sigma, sigma, years.size)
    return years, losses


def _sanity(table, tower):
    el, prem = table["expected_loss"].to_numpy(), table["premium"].to_numpy()
    cap = np.array([x.share * x.agg_limit for x in tower])
    assert np.all(prem >= el) and np.all(el > 0)
    assert np.all(prem <= cap)
    assert np.all(np.diff(table["rate_on_line"]) < 0)  # higher layers are cheaper per unit of limit here
    assert np.all(np.isfinite(table["return_on_capital"]))


def _whole(table_parts, table_whole, prices_add, rtol=1e-12):
    assert table_parts["expected_loss"].sum() == pytest.approx(table_whole["expected_loss"], rel=rtol)
    if prices_add:
        assert table_parts["premium"].sum() == pytest.approx(table_whole["premium"], rel=1e-12)
    else:
        assert table_whole["premium"] <= table_parts["premium"].sum()


def premium_standard_error(x, g):
    """Standard error of the distortion price of an equally weighted sample x, from the influence function."""
    x = np.sort(x)
    n = x.size
    v, idx = np.unique(x, return_index=True)
    s = (n - np.append(idx[1:], n)) / n  # P(X > v_i)
    s_seg = s[:-1]  # S on [v_i, v_i+1)
    width = np.diff(v)
    d = np.maximum(1e-6 * np.minimum(s_seg, 1 - s_seg), 1e-12)
    gp = (np.asarray(g(np.clip(s_seg + d, 0, 1))) - np.asarray(g(np.clip(s_seg - d, 0, 1)))) / (2 * d)
    # IF(v_j) = sum over segments below v_j of g'(S) width - sum over all of g'(S) S width
    below = np.concatenate([[0.0], np.cumsum(gp * width)])
    influence = below - np.sum(gp * s_seg * width)
    counts = np.diff(np.append(idx, n))
    var = np.sum(counts * influence**2) / n - (np.sum(counts * influence) / n) ** 2
    return math.sqrt(var / n)


def test_occurrence_tower_on_model_and_sample(simulated):
    years, losses = simulated
    model = lw.FrequencySeverity(lw.poisson(LAMBDA), lw.lognormal(mean=MEAN, cv=CV))
    sample = lw.YearEventTable(years, losses, n_years=N_YEARS)
    tower = lw.stack(OCC_LIMITS, start=1e6, reinstatements=0)
    t_model = lw.price_layers(model, tower, G)  # one call each
    t_sample = lw.price_layers(sample, tower, G)
    for table in (t_model, t_sample):
        _sanity(table, tower)
    # stacked occurrence layers: expected losses add (only with unlimited aggregates, see below)
    unlimited = lw.stack(OCC_LIMITS, start=1e6)
    # (on the model each per-occurrence layer has its own grid, exact in mean up to the transform's
    # round-off, measured at about 1e-8 relative: see test_reference_aggregate.py)
    for m, rtol in ((model, 1e-7), (sample, 1e-12)):
        parts = lw.price_layers(m, unlimited, G)
        _whole(parts, lw.price_layer(m, lw.Layer.occurrence(1e6, OCC_LIMITS.sum()), G), prices_add=False, rtol=rtol)
    # model against sample
    for i, lay in enumerate(tower):
        x = sample.layer_distribution(lay)
        annual = _annual_layer_losses(years, losses, lay)
        se_el = annual.std() / math.sqrt(N_YEARS)
        assert abs(t_model["expected_loss"].iloc[i] - t_sample["expected_loss"].iloc[i]) <= 5 * se_el + 1e-9 * MEAN, i
        se_p = premium_standard_error(annual, G)
        assert abs(t_model["premium"].iloc[i] - t_sample["premium"].iloc[i]) <= 5 * se_p + 1e-9 * MEAN, i
        assert x.mean() == pytest.approx(annual.mean(), rel=1e-12)


def _annual_layer_losses(years, losses, lay):
    pay = np.clip(losses - lay.occ_attachment, 0.0, lay.occ_limit)
    annual = np.bincount(years - 1, weights=pay, minlength=N_YEARS)
    return lay.share * np.clip(annual - lay.agg_attachment, 0.0, lay.agg_limit)


def test_aggregate_tower_on_model_and_year_loss_table(simulated):
    years, losses = simulated
    model = lw.FrequencySeverity(lw.poisson(LAMBDA), lw.lognormal(mean=MEAN, cv=CV))
    annual = np.bincount(years - 1, weights=losses, minlength=N_YEARS)
    sample = lw.YearLossTable(annual)
    tower = lw.stack(AGG_LIMITS, start=5e6, basis="aggregate")
    whole = lw.Layer.aggregate(5e6, AGG_LIMITS.sum())
    t_model = lw.price_layers(model, tower, G)
    t_sample = lw.price_layers(sample, tower, G)
    for m, table in ((model, t_model), (sample, t_sample)):
        _sanity(table, tower)
        _whole(table, lw.price_layer(m, whole, G), prices_add=True)
    for i, lay in enumerate(tower):
        x = np.clip(annual - lay.agg_attachment, 0.0, lay.agg_limit)
        se_el = x.std() / math.sqrt(N_YEARS)
        assert abs(t_model["expected_loss"].iloc[i] - t_sample["expected_loss"].iloc[i]) <= 5 * se_el, i
        assert abs(t_model["premium"].iloc[i] - t_sample["premium"].iloc[i]) <= 5 * premium_standard_error(x, G), i
    # the model's whole annual mean is the compound mean E[N] E[X] (to the transform's round-off)
    assert model.mean == pytest.approx(LAMBDA * MEAN, rel=2e-8)


def test_priced_table_text_columns_hold_the_text():
    # the text columns are built in pandas' own string dtype (Python storage) where it has one: the same
    # strings as the layers' descriptions and the distortion names, compared as text and never lost to NaN
    model = lw.FrequencySeverity(lw.poisson(2.0), lw.lognormal(mean=1e6, cv=1.5))
    tower = lw.stack([1e6, 2e6], start=1e6)
    gs = {"wang": lw.WangTransform(0.3), "tvar": lw.TVaRDistortion(0.9)}
    df = lw.price_layers(model, tower, gs)
    assert df["distortion"].tolist() == ["wang", "wang", "tvar", "tvar"]
    assert df["layer"].tolist() == [x.describe() for x in tower] * 2
    assert df["warning"].tolist() == [""] * 4
    assert (df["distortion"] == "tvar").sum() == 2 and not df[["distortion", "layer", "warning"]].isna().any().any()
    from layerwise.engine import pricing

    if pricing._TEXT is not None:  # pandas 2.3 and later
        assert all(df[c].dtype == "str" for c in ("distortion", "layer", "warning"))
