"""Input validation shared by the whole engine.

Every check raises :class:`InputError`, a ``ValueError`` that names the
offending argument and its valid range, so the bridge can turn it into a
cell error message without parsing text.
"""
from __future__ import annotations

import math
import numbers

import numpy as np

__all__ = ["InputError", "GridWarning", "as_float", "as_array"]


class InputError(ValueError):
    """Bad input. ``argument`` names it, ``message`` says what is wrong."""

    def __init__(self, argument: str, message: str):
        self.argument = argument
        self.message = message
        super().__init__(f"{argument}: {message}")


class GridWarning(UserWarning):
    """A grid result whose discretisation diagnostics exceed their tolerance."""


def as_float(
    value,
    argument: str,
    *,
    low: float = -math.inf,
    high: float = math.inf,
    low_open: bool = False,
    high_open: bool = False,
    allow_inf: bool = False,
) -> float:
    """Return ``value`` as a float inside the stated interval, or raise InputError."""
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.floating, np.integer)):
        raise InputError(argument, f"expected a number, got {value!r}")
    x = float(value)
    if math.isnan(x):
        raise InputError(argument, "expected a number, got NaN")
    if math.isinf(x) and not allow_inf:
        raise InputError(argument, f"expected a finite number, got {x}")
    too_low = x <= low if low_open else x < low
    too_high = x >= high if high_open else x > high
    if too_low or too_high:
        left = "(" if low_open else "["
        right = ")" if high_open else "]"
        raise InputError(argument, f"must lie in {left}{_fmt(low)}, {_fmt(high)}{right}, got {_fmt(x)}")
    return x


def as_array(values, argument: str, *, low: float = -math.inf, allow_empty: bool = False) -> np.ndarray:
    """Return a 1-D float64 array of finite numbers >= ``low``, or raise InputError."""
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(argument, "expected numbers only") from None
    arr = np.atleast_1d(arr)
    if arr.ndim != 1:
        arr = arr.reshape(-1)
    if arr.size == 0 and not allow_empty:
        raise InputError(argument, "is empty")
    if not np.all(np.isfinite(arr)):
        raise InputError(argument, "contains NaN or infinite values")
    if arr.size and arr.min() < low:
        raise InputError(argument, f"values must be >= {_fmt(low)}, smallest is {_fmt(arr.min())}")
    return arr


def _fmt(x: float) -> str:
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.6g}"
