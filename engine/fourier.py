"""Discretisation of severities and Fourier aggregation of compound distributions.

Grid conventions: bucket size ``h``, grid points k*h for k = 0..n-1. A
severity (possibly already cut to a per-occurrence layer) is discretised by
one of two published methods (Klugman, Panjer & Willmot, *Loss Models*, the
"method of rounding" and the first-order "method of local moment
matching"); both are written through the discretised survival at grid points:

    rounding: S_d(k h) = S((k + 1/2) h)
    moment:   S_d(k h) = (1/h) * integral_{kh}^{(k+1)h} S(x) dx   (mean preserved)

The moment integral is Simpson's rule on each bucket, exact to O(h^4) for
smooth S. The aggregate is computed with numpy's real FFT on a zero-padded
grid after an exponential tilt (Grubel & Hermesmeier 1999), which damps the
wrap-around of mass beyond the padded grid by exp(-TILT).
"""
from __future__ import annotations

import functools
import math

import numpy as np

from .errors import InputError

__all__ = ["discretise", "aggregate", "nice_bucket", "METHODS", "MAX_GRID_LENGTH"]

METHODS = ("moment", "rounding")
MAX_GRID_LENGTH = 2**22  # upper bound on work per model: 4M points, about 100 MB of transform
TILT = 20.0  # total log-damping over the padded grid; keeps round-off amplification below e^(TILT/padding)
ROUNDOFF = 1e-15  # grid probabilities below this are transform round-off, set to zero


def nice_bucket(h: float) -> float:
    """Round a bucket size up to 1, 2, 2.5 or 5 times a power of ten, so round layer bounds fall on grid points."""
    if not (h > 0 and math.isfinite(h)):
        raise InputError("bucket", f"must be a positive number, got {h!r}")
    e = math.floor(math.log10(h))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        c = m * 10.0**e
        if c >= h * (1 - 1e-12):
            return c
    return 10.0 ** (e + 1)  # pragma: no cover


def discretise(sf, h: float, n: int, attachment: float = 0.0, limit: float = math.inf, method: str = "moment"):
    """Probabilities of min(max(X - a, 0), l) on the grid 0, h, ..., (n-1) h.

    ``sf`` is the ground-up survival function (vectorised). A finite ``limit``
    must be a whole number m of buckets with m < n; its atom sits at index m.
    Returns ``(probs, tail)`` where ``probs`` has shape (n,) and ``tail`` is the
    probability that the layered loss is at or beyond n*h (0 for a finite limit).
    """
    if method not in METHODS:
        raise InputError("method", f"must be one of {', '.join(METHODS)}, got {method!r}")
    finite = math.isfinite(limit)
    m = int(round(limit / h)) if finite else n
    if finite and (abs(m * h - limit) > 1e-9 * limit or m >= n or m < 1):
        raise InputError("bucket", f"the limit {limit:g} must be a whole number of buckets below the grid length")
    k = np.arange(m, dtype=float)
    if method == "rounding":
        sd = sf(attachment + (k + 0.5) * h)
    else:
        edges = sf(attachment + np.arange(m + 1, dtype=float) * h)
        mids = sf(attachment + (k + 0.5) * h)
        sd = (edges[:-1] + 4.0 * mids + edges[1:]) / 6.0
    sd = np.minimum.accumulate(np.clip(sd, 0.0, 1.0))  # guard against non-monotone round-off in scipy's sf
    probs = np.zeros(n)
    probs[0] = 1.0 - sd[0]
    probs[1:m] = sd[:-1][: m - 1] - sd[1:m]
    if finite:
        probs[m] = sd[m - 1]
        return probs, 0.0
    return probs, float(sd[-1])


@functools.lru_cache(maxsize=8)
def _tilt_factors(n: int, size: int):
    theta = TILT / size
    k = np.arange(n + 1, dtype=float)
    down, up = np.exp(-theta * k), np.exp(theta * k[:n])
    down.flags.writeable = False
    up.flags.writeable = False
    return down, up


def _tilts(n: int, size: int):
    """(exp(-theta k) for k = 0..n, exp(theta k) for k = 0..n-1), theta = TILT / size; remembered up to 2**20 points."""
    return _tilt_factors(n, size) if n <= 2**20 else _tilt_factors.__wrapped__(n, size)


def aggregate(pgf, probs: np.ndarray, tail: float, padding: int = 2):
    """Compound distribution on the same grid: returns ``(agg, beyond)``.

    ``pgf`` is the claim-count generating function (complex in, complex out),
    ``probs`` the discretised severity of shape (n,), ``tail`` the severity's
    probability beyond the grid (placed at index n, so every year that
    contains such a loss lands beyond the grid). ``agg`` has shape (n,);
    ``beyond`` is the aggregate probability at or beyond n*h.
    """
    n = probs.size
    size = n * max(int(padding), 2)
    down, up = _tilts(n, size)
    f = np.zeros(size)  # only the first n + 1 points carry mass: only they need tilting
    np.multiply(probs, down[:n], out=f[:n])
    f[n] = tail * down[n]
    # exact: sum_k e^{-theta k} p_k z^k = P_N(phi(z e^{-theta})), so untilting recovers p_k
    a = np.fft.irfft(pgf(np.fft.rfft(f)), size)[:n]
    a *= up
    a[a < ROUNDOFF] = 0.0
    total = float(a.sum())
    if total > 1.0:
        a /= total
        total = 1.0
    return a, max(1.0 - total, 0.0)
