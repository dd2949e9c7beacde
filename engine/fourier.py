"""Discretisation of severities and Fourier aggregation of compound distributions.

Grid conventions: bucket size ``h``, grid points k*h for k = 0..n-1. A
severity (possibly already cut to a per-occurrence layer) is discretised by
one of two published methods (Klugman, Panjer & Willmot, *Loss Models*, the
"method of rounding" and the first-order "method of local moment
matching"); both are written through the discretised survival at grid points:

    rounding: S_d(k h) = S((k + 1/2) h)
    moment:   S_d(k h) = (1/h) * integral_{kh}^{(k+1)h} S(x) dx   (mean preserved)

The moment integral is Simpson's rule on each bucket, exact to O(h^4) for
smooth S. Where S bends (trapezoid and midpoint values differ by more than
``BEND_ABOVE``) and Simpson's error, estimated from the fourth differences of
S over the bucket and each neighbour, may exceed ``SIMPSON_BELOW`` of S, Simpson
is also taken on the bucket's halves and the two extrapolated (Boole's rule,
O(h^6)). Where even they differ by more than ``REFINE_ABOVE`` (the body of
a lognormal with a large cv inside the first buckets, a kink such as a
single-parameter Pareto's threshold, a density infinite at 0 as for gamma or
Weibull shapes below 1: Simpson alone loses up to 1e-3 of the mean there)
Simpson is taken on the bucket's quarters too and the next Romberg column
kept (O(h^8)) where it agrees with Boole's rule to ``REFINE_ABOVE``; only the
buckets where it does not (a kink or a singularity) are integrated again by
4 x 16-point Gauss-Legendre. The first bucket of a ground-up grid (where a
density may be infinite), and an excess layer's first bucket where even the
Romberg column is not trusted, are integrated on pieces shrinking
geometrically towards their left end.

The aggregate is computed with scipy's real FFT on a zero-padded grid after
an exponential tilt (Grubel & Hermesmeier 1999), which damps the wrap-around
of mass beyond the padded grid by exp(-TILT).
"""
from __future__ import annotations

import functools
import math

import numpy as np
from scipy import fft

from .errors import InputError

__all__ = ["discretise", "aggregate", "aggregate_rows", "nice_bucket", "METHODS", "MAX_GRID_LENGTH"]

METHODS = ("moment", "rounding")
MAX_GRID_LENGTH = 2**22  # upper bound on work per model: 4M points, about 100 MB of transform
TILT = 20.0  # total log-damping over the padded grid; keeps round-off amplification below e^(TILT/padding)
ROUNDOFF = 1e-15  # grid probabilities below this are transform round-off, set to zero
BEND_ABOVE = 1e-9  # |trapezoid - midpoint| of S on a bucket above which Simpson is checked on the halves
REFINE_ABOVE = 1e-12  # |Simpson - Simpson on halves| of S's mean on a bucket above which neither is trusted
SIMPSON_BELOW = 1e-13  # Simpson's estimated relative error on a bending bucket below which it is kept
REFINE_MAX = 4096  # at most this many buckets re-integrated (the sharpest bends first): about 64 sf calls each
_GL_X, _GL_W = np.polynomial.legendre.leggauss(16)
_GL_X, _GL_W = 0.5 * (_GL_X + 1.0), 0.5 * _GL_W  # on [0, 1]
_EVEN = np.linspace(0.0, 1.0, 5)  # 4 equal pieces of a bucket
_QUARTER_ENDS = np.array([0.25, 0.75])
_ODD_EIGHTHS = np.array([0.125, 0.375, 0.625, 0.875])
_GEOMETRIC = np.concatenate([[0.0], 2.0 ** np.arange(-30, 1)])  # pieces halving towards the bucket's left end
_EVEN_PIECES, _GEOMETRIC_PIECES = ((p[:-1], np.diff(p)) for p in (_EVEN, _GEOMETRIC))  # (starts, widths) in buckets


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
    if method == "rounding":
        sd = np.array(sf(attachment + (np.arange(m, dtype=float) + 0.5) * h), dtype=float)  # a copy of its own: clipped in place below
    else:
        # edges k h and midpoints (k + 1/2) h in one call, as the points j (h / 2): the same numbers
        both = np.asarray(sf(attachment + np.arange(2 * m + 1, dtype=float) * (0.5 * h)), dtype=float)
        edges, mids = both[0::2].copy(), both[1::2].copy()
        sd = (edges[:-1] + 4.0 * mids + edges[1:]) / 6.0
        bend = np.abs(0.5 * (edges[:-1] + edges[1:]) - mids)  # 3/2 of Simpson's correction to the trapezoid
        # where S bends and Simpson is not already settled, Simpson on the bucket's halves too (two more
        # points), extrapolated (Boole's rule, O(h^6)); then Romberg on quarters, then Gauss-Legendre
        bent = np.flatnonzero(bend > BEND_ABOVE)
        # the first bucket of a ground-up grid is integrated on geometric pieces whatever it does (a density
        # may be infinite at 0), so it is left out here; an excess layer's first bucket is checked like any other
        first = not attachment > 0  # the first bucket on geometric pieces
        bent = bent[~_simpson_settled(edges, mids, bent, first)]
        sharp = bent
        if bent.size:
            quarters = np.asarray(sf(attachment + (bent[:, None] + _QUARTER_ENDS) * h), dtype=float).reshape(-1, 2)
            lo, hi, mid = edges[bent], edges[bent + 1], mids[bent]
            halves = (lo + 4.0 * quarters[:, 0] + 2.0 * mid + 4.0 * quarters[:, 1] + hi) / 12.0
            change = np.abs(halves - sd[bent])
            sd[bent] = boole = halves + (halves - sd[bent]) / 15.0
            keep = change > REFINE_ABOVE
            sharp = bent[keep]
            if sharp.size:
                # one more halving (Simpson on quarters, Romberg's next column); only where even that
                # disagrees with Boole's rule by more than REFINE_ABOVE is the bucket integrated by quadrature
                eighths = np.asarray(sf(attachment + (sharp[:, None] + _ODD_EIGHTHS) * h), dtype=float).reshape(-1, 4)
                evens = lo[keep] + 2.0 * (quarters[keep, 0] + mid[keep] + quarters[keep, 1]) + hi[keep]
                quarter = (evens + 4.0 * eighths.sum(axis=1)) / 24.0
                finer = quarter + (quarter - halves[keep]) / 15.0
                change = np.abs(finer - boole[keep])
                sd[sharp] = finer + (finer - boole[keep]) / 63.0
                keep = change > REFINE_ABOVE
                sharp, change = sharp[keep], change[keep]
                if sharp.size and sharp[0] == 0:  # ascending, so it leads: an excess layer's first bucket
                    first, sharp, change = True, sharp[1:], change[1:]
                if sharp.size > REFINE_MAX:
                    sharp = sharp[np.argpartition(change, -REFINE_MAX)[-REFINE_MAX:]]
        if sharp.size:
            sd[sharp] = _bucket_means(sf, attachment + sharp * h, h, _EVEN_PIECES)
        if first:
            sd[0] = _bucket_means(sf, np.array([float(attachment)]), h, _GEOMETRIC_PIECES)[0]
    np.maximum(sd, 0.0, out=sd)
    np.minimum(sd, 1.0, out=sd)
    if not (sd[1:] <= sd[:-1]).all():  # guard against non-monotone round-off in scipy's sf (a sequential scan: only when needed)
        sd = np.minimum.accumulate(sd)
    probs = np.zeros(n)
    probs[0] = 1.0 - sd[0]
    probs[1:m] = sd[:-1][: m - 1] - sd[1:m]
    if finite:
        probs[m] = sd[m - 1]
        return probs, 0.0
    return probs, float(sd[-1])


def _simpson_settled(edges: np.ndarray, mids: np.ndarray, b: np.ndarray, first_settled: bool = True) -> np.ndarray:
    """True where Simpson's rule is already within ``SIMPSON_BELOW`` of S on bucket ``b``, relative (and
    for bucket 0 when ``first_settled``: it is integrated on geometric pieces in any case).

    Simpson's error on a bucket mean is h^4 S''''/2880, about 1/180 of the
    fourth difference of S at spacing h/2 (edges and midpoints); it is taken
    over the bucket with each neighbour, the larger of the two, so a kink or
    a bend within reach of the bucket keeps it for refinement.
    """
    m = mids.size
    if m < 2:
        return (b == 0) & first_settled
    if m <= 3000 + 5 * b.size:  # whole slices cost about 10 ns a bucket, gathers 30 us plus 50 ns a bend
        d4 = np.zeros(m + 1)  # window (j, j + 1) at d4[j + 1]; 0 past either end
        np.abs(edges[:-2] - 4.0 * mids[:-1] + 6.0 * edges[1:-1] - 4.0 * mids[1:] + edges[2:], out=d4[1:m])
        est = np.maximum(d4[b], d4[b + 1])  # the windows (b - 1, b) and (b, b + 1)
    else:
        est = np.zeros(b.size)
        for first, ok in ((b, b <= m - 2), (b - 1, b >= 1)):  # the windows (b, b + 1) and (b - 1, b)
            w = first[ok]
            d4 = np.abs(edges[w] - 4.0 * mids[w] + 6.0 * edges[w + 1] - 4.0 * mids[w + 1] + edges[w + 2])
            est[ok] = np.maximum(est[ok], d4)
    settled = est / 180.0 <= SIMPSON_BELOW * mids[b]  # relative: far-tail buckets keep their digits
    return settled | (b == 0) if first_settled else settled


def _bucket_means(sf, starts: np.ndarray, h: float, pieces: tuple) -> np.ndarray:
    """(1/h) * integral of sf over [s, s + h] for each s in ``starts`` (shape (r,)).

    Gauss-Legendre with 16 points on each piece; ``pieces`` is (left ends,
    widths) of the pieces as fractions of the bucket, covering [0, 1].
    """
    left, width = pieces
    width = width * h
    x = starts[:, None, None] + (left * h)[None, :, None] + width[None, :, None] * _GL_X[None, None, :]
    s = np.asarray(sf(x.ravel()), dtype=float).reshape(x.shape)
    return (s @ _GL_W) @ width / h


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


def aggregate(pgf, probs: np.ndarray, tail: float, padding: int = 2, max_count: float = math.inf):
    """Compound distribution on the same grid: returns ``(agg, beyond)``.

    ``pgf`` is the claim-count generating function (complex in, complex out; it
    may overwrite its argument, a scratch spectrum),
    ``probs`` the discretised severity of shape (n,), ``tail`` the severity's
    probability beyond the grid (placed at index n, so every year that
    contains such a loss lands beyond the grid). ``agg`` has shape (n,);
    ``beyond`` is the aggregate probability at or beyond n*h.

    ``max_count`` is the largest possible number of claims (fixed counts,
    binomial). With a bounded severity grid (no ``tail``) the aggregate then
    ends at ``max_count`` times the severity's last atom; when that is on the
    grid, the grid above it is set to zero and ``beyond`` is 0. (The untilt
    multiplies the transform's round-off, about 1e-18 of tilted probability,
    by up to exp(TILT / padding): enough to leave spurious atoms of a few
    1e-15 above the largest possible loss, which a distortion with a jump at
    0, cost of capital, would charge capital for.)
    """
    n = probs.size
    size = n * max(int(padding), 2)
    down, up = _tilts(n, size)
    f = np.zeros(size)  # only the first n + 1 points carry mass: only they need tilting
    np.multiply(probs, down[:n], out=f[:n])
    f[n] = tail * down[n]
    # exact: sum_k e^{-theta k} p_k z^k = P_N(phi(z e^{-theta})), so untilting recovers p_k
    # scipy's transforms: 15-25% faster than numpy's here; f and the spectrum are scratch
    a = fft.irfft(pgf(fft.rfft(f, overwrite_x=True)), size, overwrite_x=True)[:n]
    _cleared(a, up)
    return _held(a, probs, tail, max_count, a.sum())


def aggregate_rows(pgf, probs: np.ndarray, tails, padding: int = 2, max_count: float = math.inf) -> list:
    """:func:`aggregate` of each row of ``probs`` (shape (r, n)) with its tail ``tails[i]``: a list of
    ``(agg, beyond)``, the same numbers, bit for bit, from one 2-D transform of all the rows (less
    overhead than one by one)."""
    r, n = probs.shape
    size = n * max(int(padding), 2)
    down, up = _tilts(n, size)
    f = np.zeros((r, size))
    np.multiply(probs, down[:n], out=f[:, :n])
    f[:, n] = np.asarray(tails, dtype=float) * down[n]
    agg = fft.irfft(pgf(fft.rfft(f, axis=-1, overwrite_x=True)), size, axis=-1, overwrite_x=True)[:, :n]
    _cleared(agg, up)
    totals = agg.sum(axis=1)  # each row's sum, as a.sum() gives it
    return [_held(a, p, tail, max_count, total) for a, p, tail, total in zip(agg, probs, tails, totals)]


def _cleared(a: np.ndarray, up: np.ndarray):
    """Untilt the inverse transform ``a`` of a tilted compound (shape (n,), or (r, n) for r of them) in
    place and clear its round-off."""
    a *= up
    a[a < ROUNDOFF] = 0.0


def _held(a: np.ndarray, probs: np.ndarray, tail: float, max_count: float, total) -> tuple:
    """(agg, beyond) from the untilted, cleared compound ``a`` of sum ``total``, held to the largest
    possible total (see :func:`aggregate`)."""
    n = a.size
    nz = np.flatnonzero(probs) if math.isfinite(max_count) and not tail > 0 else None
    if nz is not None and nz.size and max_count * nz[-1] < n:
        # the whole compound lies on the grid: nothing above the largest possible total, nothing beyond
        a[int(max_count * nz[-1]) + 1 :] = 0.0
        a /= a.sum()
        return a, 0.0
    total = float(total)
    if total > 1.0:
        a /= total
        total = 1.0
    return a, max(1.0 - total, 0.0)
