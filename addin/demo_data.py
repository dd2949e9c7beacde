"""Invented demo data for the example workbooks and the ``layerwise demo`` command.

Nothing here describes a real company, portfolio, place or event. The data are
drawn from fixed seeds so every build of the examples is identical.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["storm_year_event_table", "casualty_assumptions", "DEMO_CURRENCY"]

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
