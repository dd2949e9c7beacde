"""From technical to gross premium: brokerage and expense loads as shares of the gross premium.

If brokerage b and expenses e are fractions of the gross premium G, the
technical premium T (the risk-loaded price of the loss) is what is left:
T = G (1 - b - e), so G = T / (1 - b - e). Loss ratios follow on both bases:
expected loss / T (technical) and expected loss / G (gross).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .errors import InputError, as_float

__all__ = ["gross_premium", "with_gross_columns", "GROSS_COLUMNS"]

GROSS_COLUMNS = ["gross_premium", "brokerage_amount", "expense_amount", "gross_rate_on_line", "gross_loss_ratio"]


def _loads(brokerage, expenses) -> tuple[float, float]:
    b = as_float(brokerage, "brokerage", low=0.0, high=1.0, high_open=True)
    e = as_float(expenses, "expenses", low=0.0, high=1.0, high_open=True)
    if b + e >= 1.0:
        raise InputError("expenses", f"brokerage plus expenses must be below 1 (100% of gross premium), got {b + e:.6g}")
    return b, e


def gross_premium(technical, brokerage: float = 0.0, expenses: float = 0.0):
    """Gross premium T / (1 - brokerage - expenses), vectorised over ``technical`` (currency, >= 0)."""
    b, e = _loads(brokerage, expenses)
    t = np.asarray(technical, dtype=float)
    if t.size and (not np.all(np.isfinite(t)) or t.min() < 0):
        raise InputError("technical", "premiums must be finite and >= 0")
    out = t / (1.0 - b - e)
    return out if out.ndim else float(out)


def with_gross_columns(table: pd.DataFrame, brokerage: float = 0.0, expenses: float = 0.0) -> pd.DataFrame:
    """A copy of a pricing table (from price_layers) with gross premium columns added.

    Needs columns ``premium`` (technical) and ``expected_loss``; ``share`` and
    ``limit`` give the gross rate on line when present. Adds
    :data:`GROSS_COLUMNS`: gross premium, the brokerage and expense amounts,
    gross rate on line and gross loss ratio (expected loss / gross premium).
    """
    if not isinstance(table, pd.DataFrame):
        raise InputError("table", f"expected a pricing table (DataFrame), got {type(table).__name__}")
    missing = {"premium", "expected_loss"} - set(table.columns)
    if missing:
        raise InputError("table", f"needs columns premium and expected_loss; missing {sorted(missing)}")
    b, e = _loads(brokerage, expenses)
    out = table.copy()
    gp = gross_premium(out["premium"].to_numpy(dtype=float), b, e)
    out["gross_premium"] = gp
    out["brokerage_amount"] = b * gp
    out["expense_amount"] = e * gp
    if {"share", "limit"} <= set(out.columns):
        with np.errstate(divide="ignore", invalid="ignore"):
            out["gross_rate_on_line"] = gp / (out["share"].to_numpy(dtype=float) * out["limit"].to_numpy(dtype=float))
    else:
        out["gross_rate_on_line"] = np.nan
    el = out["expected_loss"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out["gross_loss_ratio"] = np.where(gp > 0, el / gp, np.nan)
    return out
