"""Occurrence layers on a year-event table against a direct pandas computation.

Each event pays min(max(x - a, 0), l) (per-occurrence terms); a year's
payments are summed (pandas groupby, years without events count as 0); the
annual aggregate deductible d and aggregate limit L then apply,
min(max(T - d, 0), L) (an occurrence layer with n reinstatements has
L = l (1 + n)), and the share s scales the result (common practice, no
source). The distortion price of an equally likely sample x_(1) <= ... <= x_(n)
is sum_i x_(i) [g((n - i + 1)/n) - g((n - i)/n)], the integral of g(S) for
its step survival function, written here from that definition.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw

N_YEARS = 4000


@pytest.fixture(scope="module")
def events():
    rng = np.random.default_rng(2024)
    counts = rng.negative_binomial(2, 2 / (2 + 3.0), N_YEARS - 100)  # mean 3; the last 100 years have no events
    years = np.repeat(np.arange(1, N_YEARS - 99), counts)
    losses = rng.lognormal(0.0, 1.2, years.size)
    losses[::50] = 2.0  # ties exactly at an attachment
    order = rng.permutation(years.size)  # events in no particular order
    return pd.DataFrame({"year": years[order], "loss": losses[order]})


def reference(frame, layer):
    pay = (frame["loss"] - layer.occ_attachment).clip(lower=0.0, upper=layer.occ_limit)
    annual = pay.groupby(frame["year"]).sum().reindex(range(1, N_YEARS + 1), fill_value=0.0).to_numpy()
    return layer.share * np.clip(annual - layer.agg_attachment, 0.0, layer.agg_limit), annual


def sample_price(x, g):
    x = np.sort(x)
    n = x.size
    i = np.arange(1, n + 1)
    w = np.asarray(g((n - i + 1) / n)) - np.asarray(g((n - i) / n))
    return float(np.dot(x, w))


LAYERS = [
    lw.Layer.occurrence(1.0, 2.0),
    lw.Layer.occurrence(2.0, 3.0, reinstatements=0),
    lw.Layer.occurrence(2.0, 3.0, reinstatements=1),
    lw.Layer.occurrence(2.0, 3.0, reinstatements=2, share=0.4),
    lw.Layer.occurrence(0.5, 1.5, agg_deductible=1.0, agg_limit=4.0),
    lw.Layer.occurrence(5.0, math.inf),
    lw.Layer.occurrence(0.0, 1.0, agg_deductible=2.5, share=0.75),
    lw.Layer.aggregate(5.0, 10.0),
    lw.Layer.aggregate(0.0, math.inf, share=0.1),
]
DISTORTIONS = [lw.WangTransform(0.5), lw.ProportionalHazard(0.7), lw.TVaRDistortion(0.9), lw.DualPower(2.0)]


@pytest.mark.parametrize("g", DISTORTIONS, ids=lambda g: g.family)
def test_occurrence_layers_match_pandas(events, g):
    model = lw.YearEventTable(events["year"].to_numpy(), events["loss"].to_numpy(), n_years=N_YEARS)
    table = lw.price_layers(model, LAYERS, g)
    for i, lay in enumerate(LAYERS):
        x, annual = reference(events, lay)
        row = table.iloc[i]
        assert row["expected_loss"] == pytest.approx(x.mean(), rel=1e-12, abs=1e-15)
        assert row["premium"] == pytest.approx(sample_price(x, g), rel=1e-11, abs=1e-15)
        assert row["std"] == pytest.approx(x.std(), rel=1e-9, abs=1e-12)
        assert row["prob_attach"] == pytest.approx(np.mean(x > 0), abs=1e-15)
        if math.isfinite(lay.agg_limit):
            exhausted = np.mean(annual - lay.agg_attachment >= lay.agg_limit)
            assert row["prob_exhaust"] == pytest.approx(exhausted, abs=1e-15)
            assert row["collateral"] == pytest.approx(lay.share * lay.agg_limit)


def test_reinstatements_set_the_aggregate_limit(events):
    model = lw.YearEventTable(events["year"].to_numpy(), events["loss"].to_numpy(), n_years=N_YEARS)
    l = 3.0
    for n in range(4):
        lay = lw.Layer.occurrence(2.0, l, reinstatements=n)
        assert lay.agg_limit == l * (1 + n)
        x, annual = reference(events, lay)
        assert x.max() <= l * (1 + n)
        got = lw.price_layer(model, lay, lw.WangTransform(0.3))
        assert got["expected_loss"] == pytest.approx(x.mean(), rel=1e-12)
    # more reinstatements never lower the expected loss; with enough of them it is the unlimited one
    els = [lw.price_layer(model, lw.Layer.occurrence(2.0, l, reinstatements=n), lw.WangTransform(0.0))["expected_loss"]
           for n in (0, 1, 2, 5, 50)]
    assert np.all(np.diff(els) >= -1e-15)
    unlimited = lw.price_layer(model, lw.Layer.occurrence(2.0, l), lw.WangTransform(0.0))["expected_loss"]
    assert els[-1] == pytest.approx(unlimited, rel=1e-14)


@pytest.mark.parametrize("g", DISTORTIONS + [lw.CostOfCapital(0.1)], ids=lambda g: g.family)
def test_share_scales_every_amount(events, g):
    model = lw.YearEventTable(events["year"].to_numpy(), events["loss"].to_numpy(), n_years=N_YEARS)
    full = lw.price_layers(model, [lw.Layer.occurrence(1.0, 2.0, reinstatements=1)], g).iloc[0]
    part = lw.price_layers(model, [lw.Layer.occurrence(1.0, 2.0, reinstatements=1, share=0.3)], g).iloc[0]
    for column in ("expected_loss", "premium", "margin", "collateral", "capital", "std"):
        assert part[column] == pytest.approx(0.3 * full[column], rel=1e-13)
    for column in ("loss_ratio", "rate_on_line", "return_on_capital", "leverage", "cv", "prob_attach", "prob_exhaust"):
        assert part[column] == pytest.approx(full[column], rel=1e-12, nan_ok=True)


def test_a_premium_equal_to_the_collateral_leaves_no_capital(events):
    """TVaR at 0.9 of a layer exhausted in more than 10% of years is its aggregate limit: no capital, no return.

    (The premium is a sum of segments that equals the limit only to round-off;
    a capital of 1e-14 must not be reported as a return of 2e14.)
    """
    model = lw.YearEventTable(events["year"].to_numpy(), events["loss"].to_numpy(), n_years=N_YEARS)
    lay = lw.Layer.occurrence(1.0, 2.0, reinstatements=1)
    x, annual = reference(events, lay)
    assert np.mean(x >= lay.agg_limit) > 0.1
    for share in (1.0, 0.3):
        row = lw.price_layer(model, lw.Layer.occurrence(1.0, 2.0, reinstatements=1, share=share), lw.TVaRDistortion(0.9))
        assert row["premium"] == pytest.approx(share * lay.agg_limit, rel=1e-13)
        assert row["capital"] == 0.0
        assert math.isnan(row["return_on_capital"]) and math.isnan(row["leverage"])


def test_years_without_events_count_and_event_order_does_not_matter(events):
    y, x = events["year"].to_numpy(), events["loss"].to_numpy()
    a = lw.YearEventTable(y, x, n_years=N_YEARS)
    order = np.argsort(y, kind="stable")
    b = lw.YearEventTable(y[order], x[order], n_years=N_YEARS)
    lay = lw.Layer.occurrence(1.0, 2.0)
    pa, pb = (lw.price_layer(m, lay, lw.WangTransform(0.5))["premium"] for m in (a, b))
    assert pa == pytest.approx(pb, rel=1e-13)
    short = lw.YearEventTable(y, x)  # n_years defaults to the last year with an event: 100 fewer zero years
    ref_short = reference(events, lay)[1][: N_YEARS - 100]
    assert lw.price_layer(short, lay, lw.WangTransform(0.0))["expected_loss"] == pytest.approx(ref_short.mean(), rel=1e-12)
