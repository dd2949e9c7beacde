"""Invented demo data for the example workbooks and the ``layerwise demo`` command.

Nothing here describes a real company, portfolio, place or event. The data are
drawn from fixed seeds so every build of the examples is identical.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = [
    "storm_year_event_table", "casualty_assumptions", "hail_year_loss_table", "per_risk_assumptions",
    "portfolio_units_table", "DEMO_CURRENCY",
]

DEMO_CURRENCY = "USD"


def storm_year_event_table(n_years: int = 10_000, seed: int = 20261201) -> pd.DataFrame:
    """A made-up windstorm catalogue: columns ``year`` (1..n_years) and ``loss`` per event.

    About 1.8 events a year (Poisson), losses a mixture of frequent moderate
    storms (lognormal) and rare severe ones (Pareto tail), in currency units.
    """
    rng = np.random.default_rng(seed)
    counts = rng.poisson(1.8, n_years)
    years = np.repeat(np.arange(1, n_years + 1), counts)
    n = years.size
    severe = rng.random(n) < 0.08
    moderate = rng.lognormal(mean=np.log(4e6), sigma=1.1, size=n)
    tail = 25e6 * (rng.pareto(1.6, size=n) + 1.0)
    loss = np.where(severe, tail, moderate)
    return pd.DataFrame({"year": years, "loss": np.round(loss, -3)})


def casualty_assumptions() -> dict:
    """Made-up casualty excess assumptions: claim count and ground-up severity per claim."""
    return {
        "frequency": ("negative_binomial", 12.0, 0.45),  # mean claims a year, count CV
        "severity": ("lognormal", 350_000.0, 3.0),  # mean and CV of a ground-up claim
    }


def hail_year_loss_table(n_years: int = 3_000, seed: int = 20270415) -> pd.DataFrame:
    """A made-up hail season aggregate: columns ``year`` (1..n_years) and ``loss``, the year's total.

    Each season has about six hail days (Poisson), each with a lognormal loss,
    and one season in twelve or so is a wet, stormy one that multiplies every
    hail day's loss; totals in currency units, rounded to thousands.
    """
    rng = np.random.default_rng(seed)
    days = rng.poisson(6.0, n_years)
    stormy = np.where(rng.random(n_years) < 0.085, rng.uniform(1.8, 4.0, n_years), 1.0)
    day_losses = rng.lognormal(mean=np.log(1.2e6), sigma=1.05, size=int(days.sum()))
    season = np.repeat(np.arange(n_years), days)
    totals = np.bincount(season, weights=day_losses, minlength=n_years) * stormy
    return pd.DataFrame({"year": np.arange(1, n_years + 1), "loss": np.round(totals, -3)})


def per_risk_assumptions() -> dict:
    """Made-up per-risk property excess: large losses above a threshold, and the layer on offer."""
    return {
        "frequency": ("poisson", 4.5),  # losses above the threshold a year
        "severity": ("single_pareto", 1.25, 250_000.0),  # Pareto shape, threshold
        "layer": {"attachment": 1_000_000.0, "limit": 4_000_000.0, "share": 0.4, "reinstatements": 2},
        "distortion": ("wang", 0.45),
    }


def portfolio_units_table(n_years: int = 2_000, seed: int = 20270901) -> pd.DataFrame:
    """Made-up annual losses of a three-unit portfolio, one row per simulated year.

    Columns ``windstorm`` (about 1.2 storms a year, mostly moderate, some
    severe with a Pareto tail), ``hail`` (seasons like
    :func:`hail_year_loss_table`) and ``casualty`` (negative binomial claim
    counts with lognormal claims), simulated independently; amounts rounded to
    thousands.
    """
    rng = np.random.default_rng(seed)
    storms = rng.poisson(1.2, n_years)
    n = int(storms.sum())
    size = np.where(rng.random(n) < 0.06, 15e6 * (rng.pareto(2.2, n) + 1.0), rng.lognormal(np.log(3e6), 1.0, n))
    windstorm = np.bincount(np.repeat(np.arange(n_years), storms), weights=size, minlength=n_years)
    hail = hail_year_loss_table(n_years, seed=seed + 1)["loss"].to_numpy()
    mean, cv = 12.0, 0.45
    r = 1.0 / (cv * cv - 1.0 / mean)  # negative binomial with this mean and cv
    counts = rng.negative_binomial(r, r / (r + mean), n_years)
    sigma = np.sqrt(np.log1p(3.0 ** 2))
    claims = rng.lognormal(np.log(350_000.0) - sigma * sigma / 2, sigma, int(counts.sum()))
    casualty = np.bincount(np.repeat(np.arange(n_years), counts), weights=claims, minlength=n_years)
    return pd.DataFrame({
        "windstorm": np.round(windstorm, -3), "hail": np.round(hail, -3), "casualty": np.round(casualty, -3),
    })
