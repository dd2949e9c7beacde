"""The one representation every loss model reduces to: a discrete distribution.

A :class:`LossDistribution` holds atoms ``values`` (ascending, distinct,
non-negative float64, shape (n,)) and ``sf`` = P(X > values[i]) (shape (n,),
non-increasing, last entry 0). Its survival function is therefore a step
function, and every integral of it is computed exactly, segment by segment:

    integral_x^inf g(S(t)) dt,   with S constant on [values[i], values[i+1]).

No derivative of g is ever taken, so atoms and ties need no special care, and
a layer boundary between two atoms is just a partial segment.

Grid (Fourier) models may leave probability ``beyond`` the top of their grid.
It is held as an atom at ``top``: every result is exact for layers that end at
or below ``top`` and a lower bound above it; :meth:`beyond_bound` gives the
largest possible error for a layer.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from .errors import InputError, as_array

__all__ = ["LossDistribution", "layer_profiles"]

_IDENTITY = None  # a distortion argument of None means g(s) = s (the expected value)
QUANTILE_TOL = 1e-12  # probability slack when inverting the cdf, so equal-weight samples hit exact order statistics
_BLOCK = 1 << 16  # atoms per block in the top-down integral pass: bounds its temporaries and keeps them in cache
_MIN_BLOCK = 1 << 13  # smallest block of a distribution too large for one block (about 1/16 of it is used)


@dataclass(frozen=True, eq=False)
class LossDistribution:
    """Discrete non-negative loss distribution with a step survival function.

    Build one with :meth:`from_atoms` or :meth:`from_sample` rather than directly.
    ``beyond`` is probability that lies at or above ``top`` in the true model
    but is held at ``top`` here (0 for exact models).
    """

    values: np.ndarray
    sf: np.ndarray
    beyond: float = 0.0
    top: float = math.inf
    diagnostics: dict = field(default_factory=dict)

    # ----------------------------------------------------------------- building
    @classmethod
    def from_atoms(cls, values, probs, *, beyond: float = 0.0, top: float | None = None, diagnostics=None, sorted_unique=False):
        """Distribution from outcomes and probabilities (any order, ties allowed).

        ``probs`` must be non-negative and sum (with ``beyond``) to 1 within 1e-9;
        they are renormalised exactly. ``beyond`` mass is placed at ``top``.
        """
        v = as_array(values, "values", low=0.0)
        p = as_array(probs, "probabilities", low=0.0)
        if v.size != p.size:
            raise InputError("probabilities", f"needs one probability per value ({v.size}), got {p.size}")
        total = p.sum() + beyond
        if abs(total - 1.0) > 1e-9:
            raise InputError("probabilities", f"must sum to 1, they sum to {total:.12g}")
        if beyond > 0:
            if top is None or not math.isfinite(top) or (v.size and top < v.max()):
                raise InputError("top", "mass beyond the grid needs a finite top at or above every value")
            v = np.append(v, top)
            p = np.append(p, beyond)
        if not sorted_unique:
            v, p = _merge_ties(v, p)
        sf = _sf_from_probs(p)
        return cls(v, sf, float(beyond), float(top) if top is not None else math.inf, dict(diagnostics or {}))

    @classmethod
    def from_sample(cls, losses, weights=None, *, argument="losses"):
        """Empirical distribution of a sample (e.g. simulated annual losses), optionally weighted."""
        x = as_array(losses, argument, low=0.0)
        if weights is None:
            v, sf = _empirical(x)
            return cls(v, sf, 0.0, math.inf, {"sample_size": int(x.size)})
        w = as_array(weights, "weights", low=0.0)
        if w.size != x.size:
            raise InputError("weights", f"needs one weight per loss ({x.size}), got {w.size}")
        if not w.sum() > 0:
            raise InputError("weights", "must not all be zero")
        order = np.argsort(x, kind="stable")
        v, p = _merge_ties(x[order], w[order] / w.sum(), presorted=True)
        return cls(v, _sf_from_probs(p), 0.0, math.inf, {"sample_size": int(x.size)})

    # ----------------------------------------------------------------- basics
    @property
    def probs(self) -> np.ndarray:
        """Probability of each atom, shape (n,)."""
        return -np.diff(self.sf, prepend=1.0)

    @property
    def size(self) -> int:
        return int(self.values.size)

    @property
    def max(self) -> float:
        return float(self.values[-1])

    def survival(self, x) -> np.ndarray:
        """P(X > x), vectorised over ``x``."""
        x = np.asarray(x, dtype=float)
        i = np.searchsorted(self.values, x, side="right") - 1
        out = np.where(i >= 0, self.sf[np.clip(i, 0, None)], 1.0)
        return out if out.ndim else float(out)

    def survival_left(self, x) -> np.ndarray:
        """P(X >= x), vectorised over ``x``."""
        x = np.asarray(x, dtype=float)
        i = np.searchsorted(self.values, x, side="left") - 1
        out = np.where(i >= 0, self.sf[np.clip(i, 0, None)], 1.0)
        return out if out.ndim else float(out)

    def cdf(self, x):
        return 1.0 - self.survival(x)

    def quantile(self, p) -> np.ndarray:
        """Lower quantile (VaR): the smallest x with P(X <= x) >= p, for p in [0, 1]."""
        p = np.asarray(p, dtype=float)
        if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
            raise InputError("p", "probability levels must lie in [0, 1]")
        # P(X <= v_i) >= p  <=>  sf_i <= 1 - p; sf is non-increasing, search its negation.
        i = np.searchsorted(-self.sf, -(1.0 - p) - QUANTILE_TOL, side="left")
        out = self.values[np.clip(i, 0, self.size - 1)]
        return out if out.ndim else float(out)

    # ----------------------------------------------------------------- integrals
    def _levels(self, distortion):
        """g(S) on each segment [values[i], values[i+1]); g(S)=1 on [0, values[0])."""
        return self.sf if distortion is None else np.asarray(distortion(self.sf), dtype=float)

    def tail_integral(self, x, distortion=None, power: int = 0) -> np.ndarray:
        """integral_x^inf t**power * g(S(t)) dt (power 0 or 1), vectorised over ``x`` >= 0.

        Summed from the top down, so high layers keep their relative precision.
        """
        x = np.asarray(x, dtype=float)
        out = _integrals([(self, x)], ((distortion, power),))[0][0]
        return out if out.ndim else float(out)

    def layer_integral(self, attachment, limit, distortion=None) -> np.ndarray:
        """integral over [a, a + l] of g(S(x)) dx: the distorted price of the layer (a, l).

        With ``distortion=None`` this is the layer's expected loss. Vectorised:
        ``attachment`` and ``limit`` broadcast together; ``limit`` may be inf.
        """
        return self.layer_profile(attachment, limit, (distortion,), second_moment=False)[2][0]

    def layer_second_moment(self, attachment, limit) -> np.ndarray:
        """E[min(max(X - a, 0), l)**2] = 2 * integral_a^{a+l} (x - a) S(x) dx."""
        return self.layer_profile(attachment, limit, ())[1]

    def layer_profile(self, attachment, limit, distortions=(), *, second_moment: bool = True):
        """(expected loss, second moment, [price under each distortion]) of the layers (a, l), in one pass.

        Each entry is exactly what :meth:`layer_integral` and
        :meth:`layer_second_moment` return for the same arguments; the second
        moment is None when ``second_moment`` is False. Shapes broadcast as in
        :meth:`layer_integral`. :func:`layer_profiles` does the same for
        several distributions at once.
        """
        return layer_profiles([(self, attachment, limit)], distortions, second_moment=second_moment)[0]

    # ----------------------------------------------------------------- whole-variable statistics
    def mean(self) -> float:
        return float(self.tail_integral(0.0))

    def price(self, distortion) -> float:
        """Distorted (spectral) price of the whole variable: integral_0^inf g(S(x)) dx."""
        return float(self.tail_integral(0.0, distortion))

    def variance(self) -> float:
        m = self.mean()
        return float(max(2.0 * self.tail_integral(0.0, power=1) - m * m, 0.0))

    def std(self) -> float:
        return math.sqrt(self.variance())

    def tvar(self, p) -> np.ndarray:
        """Tail value at risk at level p: the price under g(s) = min(s / (1 - p), 1)."""
        from .distortions import TVaRDistortion

        p = np.atleast_1d(np.asarray(p, dtype=float))
        out = np.array([self.price(TVaRDistortion(q)) for q in p])
        return out if out.size > 1 else float(out[0])

    # ----------------------------------------------------------------- transforms
    def layer(self, attachment: float, limit: float = math.inf) -> "LossDistribution":
        """Exact distribution of min(max(X - a, 0), l)."""
        v = np.clip(self.values - attachment, 0.0, limit)
        lo = np.searchsorted(v, 0.0, side="right") - 1  # last atom mapped to 0
        hi = np.searchsorted(v, limit, side="left") if math.isfinite(limit) else v.size  # first atom mapped to l
        keep = np.arange(max(lo, 0), min(hi, v.size - 1) + 1)
        vals = v[keep]
        sf = self.sf[keep]
        if math.isfinite(limit) and hi < v.size:
            sf = sf.copy()
            sf[-1] = 0.0
        diag = self.diagnostics.copy()
        if self.beyond > 0 and self.top < attachment + limit:
            diag["beyond_unbounded"] = True
        return LossDistribution(vals, sf, self.beyond if self.top < attachment + limit else 0.0,
                                self.top - attachment if self.top < attachment + limit else math.inf, diag)

    def scaled(self, factor: float) -> "LossDistribution":
        """Distribution of factor * X (factor > 0), e.g. a participation share."""
        if not factor > 0:
            raise InputError("share", f"must be positive, got {factor!r}")
        return LossDistribution(self.values * factor, self.sf, self.beyond, self.top * factor, self.diagnostics.copy())

    def beyond_bound(self, attachment, limit, distortion=None) -> np.ndarray:
        """Largest error of a layer integral caused by mass held at ``top``."""
        a = np.asarray(attachment, dtype=float)
        t = a + np.asarray(limit, dtype=float)
        if self.beyond <= 0:
            return np.zeros(np.broadcast(a, t).shape)
        overlap = np.maximum(t - np.maximum(a, self.top), 0.0)
        reach = overlap > 0
        if not reach.any():  # every layer ends at or below the top (the usual case): g is not needed
            return np.zeros(overlap.shape)
        gb = self.beyond if distortion is None else float(distortion(self.beyond))
        with np.errstate(invalid="ignore"):
            return np.where(reach, gb * overlap, 0.0)

    def __repr__(self):
        extra = f", beyond={self.beyond:.3g} at {self.top:.6g}" if self.beyond > 0 else ""
        return f"LossDistribution({self.size} atoms on [{self.values[0]:.6g}, {self.values[-1]:.6g}], mean={self.mean():.6g}{extra})"


def layer_profiles(items, distortions=(), *, second_moment: bool = True) -> list:
    """``[d.layer_profile(a, l, distortions, second_moment=second_moment) for d, a, l in items]``.

    The same numbers, bit for bit, from passes shared by all the items (one
    call of each distortion per pass rather than per distribution): the way
    to price the layers of several distributions, e.g. a tower's
    per-occurrence layers and their error-estimate grids.
    """
    prepared = []
    for d, attachment, limit in items:
        a = np.asarray(attachment, dtype=float)
        top = a + np.asarray(limit, dtype=float)
        if a.shape != top.shape:
            a, top = np.broadcast_arrays(a, top)
        prepared.append((d, a, np.concatenate([a.ravel(), top.ravel()])))
    specs = [(None, 0)] + ([(None, 1)] if second_moment else []) + [(g, 0) for g in distortions if g is not None]
    results = _integrals([(d, xs) for d, _, xs in prepared], specs, differences=True)
    out = []
    for (_, a, _), res in zip(prepared, results):
        m, shape = a.size, a.shape

        def diff(r):
            dr = (r[:m] - r[m:]).reshape(shape)
            return dr if dr.ndim else float(dr)

        first = diff(res[0])
        sm = None
        if second_moment:
            second = diff(res[1])
            sm = np.maximum(2.0 * (second - a * first), 0.0)
            sm = sm if sm.ndim else float(sm)
        rest = iter(res[2 if second_moment else 1 :])
        out.append((first, sm, [first if g is None else diff(next(rest)) for g in distortions]))
    return out


class _Query(NamedTuple):
    """Where the points ``x`` of one integral pass fall among a distribution's atoms (see :func:`_integrals`)."""

    dist: "LossDistribution"
    x: np.ndarray  # the points as given
    xf: np.ndarray  # flattened, capped at the last atom
    j: np.ndarray  # segment [v[j], v[j + 1]) holding each point (0 below the first atom)
    jn: np.ndarray  # j + 1, capped at the last atom
    head: np.ndarray | None  # points below the first atom (None when there are none)
    q_above: np.ndarray  # atoms k at which the integral over [v[k], inf) is needed
    used: int  # atoms 0 .. used - 1 take part


def _query(dist: "LossDistribution", x: np.ndarray, differences: bool) -> _Query:
    v = dist.values
    n = v.size
    xf = np.minimum(x.ravel(), v[-1])
    j = np.searchsorted(v, xf, side="right") - 1
    head = j < 0  # below the first atom, where g(S) = g(1) = 1
    has_head = bool(head.any())
    j = np.maximum(j, 0)
    jn = np.minimum(j + 1, n - 1)
    q_above = np.append(jn, 0) if has_head else jn
    used = n if not differences else int(q_above.max()) + 1
    return _Query(dist, x, xf, j, jn, head if has_head else None, q_above, used)


def _integrals(items, specs, *, differences: bool = False) -> list:
    """For each (distribution, points x) in ``items``: ``[tail_integral(x, g, p) for g, p in specs]``.

    The sums run over the segments between consecutive query points
    (``np.add.reduceat``, pairwise and vectorised), and those few partial sums
    are then accumulated from the top down, so high layers keep their relative
    precision. Only segments at or above an item's lowest query point take
    part, and the segments of all items are visited together, so g is
    evaluated once per distinct distortion and pass on those atoms alone;
    passes hold at most ``_BLOCK`` atoms (a longer item is cut into blocks,
    each block's edge one more query point), so no temporary is larger than a
    block. The results do not depend on which items share a pass.

    With ``differences`` only differences between the results are wanted
    (layer integrals): the sums then start at the highest atom any query
    needs rather than at the top, so atoms above every layer cost nothing,
    and each result is off by one common constant.
    """
    queries = [_query(d, x, differences) for d, x in items]
    k = len(specs)
    summed = _running_sums([q for q in queries if q.used >= 2], specs)
    out = []
    for q in queries:
        m = q.xf.size
        if q.used < 2:  # a single atom: only the part below it has width
            above_q, lev_q = np.zeros((k, q.q_above.size)), np.zeros((k, m))
        else:
            above_q, lev_q = summed.pop(0)
        v, xf = q.dist.values, q.xf
        vjn = v[q.jn]
        squared = [t for t, (_, power) in enumerate(specs) if power == 1]
        widths = np.empty((k, m))
        widths[:] = vjn - xf
        if squared:
            widths[squared] = 0.5 * (vjn**2 - xf**2)  # 0.5 x exact: same bits as before
        widths *= lev_q
        # the step is False at the last atom: a zero-width part, whatever g(S) is looked up there
        res = np.where(q.jn > q.j, above_q[:, :m] + widths, 0.0)
        if q.head is not None:
            heads = np.empty((k, m))
            heads[:] = v[0] - xf
            if squared:
                heads[squared] = 0.5 * (v[0] ** 2 - xf**2)
            heads += above_q[:, m : m + 1]
            res[:, q.head] = heads[:, q.head]
        res[:, q.x.ravel() >= v[-1]] = 0.0
        out.append(list(res.reshape((k,) + q.x.shape)))
    return out


def _running_sums(queries, specs) -> list:
    """For each query (``used`` >= 2) and integrand: the sum over segments s in [q, used - 1) of g(S_s)
    times the segment's width (or half its change of t**2) at each q in ``q_above``, and g(S) at each
    index in ``min(j, used - 2)``; as a list of arrays of shapes (len(specs), q_above.size) and
    (len(specs), j.size), one pair per query."""
    # cut every query's range of segments into chunks (b0, b1) with their start points
    chunks = []  # (query index, b0, b1, starts in [b0, b1), lev indices in [b0, b1), their positions, from blocks)
    starts_of = []
    for i, q in enumerate(queries):
        hi = q.used - 1  # segments 0 .. hi - 1; segment s is [v[s], v[s + 1])
        q_lev = np.minimum(q.j, q.used - 2)
        lo = int(min(q.q_above.min(), q_lev.min()))  # no query reads a segment below this one
        starts = np.unique(q.q_above[q.q_above < hi])
        if q.used <= _BLOCK + 1:
            edges, block = [lo], hi - lo
        else:  # a long distribution (a large sample): blocks of 1/16 of it, so temporaries stay well below its size
            block = min(_BLOCK, max(_MIN_BLOCK, q.used // 16))
            edges = list(range(lo, hi, block))
            if starts.size:  # every block edge above the lowest start is a start too: no sum crosses a block
                starts = np.union1d(starts, np.array([e for e in edges if e > starts[0]], dtype=starts.dtype))
        starts_of.append(starts)
        for b0 in edges:
            b1 = min(b0 + block, hi)
            s0, s1 = np.searchsorted(starts, [b0, b1])
            at = np.flatnonzero((q_lev >= b0) & (q_lev < b1)) if len(edges) > 1 else slice(None)
            chunks.append((i, b0, b1, starts[s0:s1], q_lev[at], at, len(edges) > 1))
    rows: dict = {}
    for g, _ in specs:
        rows.setdefault(id(g), g)
    which = [list(rows).index(id(g)) for g, _ in specs]
    squared = any(power == 1 for _, power in specs)
    k = len(specs)
    sums = [[] for _ in queries]  # per query, its chunks' sums in ascending order
    lev_q = [np.zeros((k, q.j.size)) for q in queries]
    # passes of whole short items, at most _BLOCK segments each; a block of a long item passes alone,
    # so its temporaries stay about the size of the block (1/16 of the item for the longest)
    group, size = [], 0
    for c in chunks + [None]:
        if c is not None and not c[6] and (not group or size + (c[2] - c[1]) <= _BLOCK):
            group.append(c)
            size += c[2] - c[1]
            continue
        if group:
            _pass(group, queries, rows, which, specs, squared, sums, lev_q)
        group, size = ([], 0) if c is None else ([c], c[2] - c[1]) if not c[6] else ([], 0)
        if c is not None and c[6]:
            _pass([c], queries, rows, which, specs, squared, sums, lev_q)
    out = []
    for i, q in enumerate(queries):
        starts = starts_of[i]
        above_q = np.zeros((k, q.q_above.size))
        if starts.size:
            per = np.concatenate(sums[i], axis=1)
            above = np.cumsum(per[:, ::-1], axis=1)[:, ::-1]  # above[:, i]: from starts[i] to the top
            read = q.q_above < q.used - 1
            above_q[:, read] = above[:, np.searchsorted(starts, q.q_above[read])]
        out.append((above_q, lev_q[i]))
    return out


def _pass(group, queries, rows, which, specs, squared, sums, lev_q):
    """One pass over the segments of the chunks in ``group``: g on their survival levels, the products
    with the widths, and their sums between start points (see :func:`_running_sums`)."""
    sfs, widths, squares, offsets, marks = [], [], [], [], []
    at = 0
    for i, b0, b1, starts, _, _, _ in group:
        d = queries[i].dist
        lv = d.values[b0 : b1 + 1]
        sfs.append(d.sf[b0:b1])
        widths.append(lv[1:] - lv[:-1])
        if squared:
            squares.append(0.5 * (lv[1:] ** 2 - lv[:-1] ** 2))
        offsets.append(at)
        marks.append(starts - b0 + at)
        at += b1 - b0
        marks.append([at])  # the chunk's end: no sum runs on into the next chunk
    s = np.concatenate(sfs) if len(sfs) > 1 else sfs[0]
    width = np.concatenate(widths) if len(widths) > 1 else widths[0]
    square = (np.concatenate(squares) if len(squares) > 1 else squares[0]) if squared else None
    levels = np.empty((len(rows), at))
    interior = all(x[0] < 1.0 and x[-1] > 0.0 for x in sfs)  # each piece non-increasing: all of s in (0, 1)
    for r, g in enumerate(rows.values()):
        if g is None:
            levels[r] = s
        else:  # a constant g broadcasts; plain functions (no ``inside``) are called as they are
            lean = getattr(g, "inside", None) if interior else None
            levels[r] = lean(s) if lean is not None else np.asarray(g(s), dtype=float)
    marks = np.unique(np.concatenate(marks).astype(np.intp, copy=False))
    marks = marks[marks < at]
    total = np.zeros((len(specs), marks.size))
    if marks.size:
        term = np.empty(at)  # one integrand's terms at a time: temporaries of a few rows of the pass
        for t, (_, power) in enumerate(specs):
            np.multiply(levels[which[t]], width if power == 0 else square, out=term)
            total[t] = np.add.reduceat(term, marks)
    for (i, b0, _, starts, q_lev, pos, _), off in zip(group, offsets):
        if starts.size:
            sums[i].append(total[:, np.searchsorted(marks, starts - b0 + off)])
        lev_q[i][:, pos] = levels[:, q_lev - b0 + off][which]


def _empirical(x: np.ndarray):
    """Distinct values of an equal-weight sample and P(X > value), sorting once and lean on memory.

    The sorted copy is the only full-size float array made besides the
    survival probabilities: when the sample has ties it is compacted in place
    block by block (so the atoms are a view of it, copied only when ties
    halve the sample), and the survival
    probabilities (count above) / n are computed block by block from the
    positions of the last element of each run of ties. Peak memory is about
    2.1 times the sample's size (sorted copy, survival, a one-byte mask).
    """
    n = x.size
    xs = np.sort(x)  # equal values are interchangeable, so any sort gives the same array; numpy's default one is the fastest
    last = np.empty(n, dtype=bool)  # last element of each run of equal values
    np.not_equal(xs[1:], xs[:-1], out=last[:-1])
    last[-1] = True
    u = int(np.count_nonzero(last))
    if u == n:
        del last
        sf = np.arange(n - 1, -1, -1, dtype=np.float64)  # counts above each atom: exact integers in float64
        sf /= n
        return xs, sf
    sf = np.empty(u)
    pos = 0
    step = min(_BLOCK, max(_MIN_BLOCK, n // 16))  # block temporaries well below the sample's size
    for lo in range(0, n, step):
        hi = min(lo + step, n)
        mask = last[lo:hi]
        ends = np.flatnonzero(mask)
        c = ends.size
        if c:
            # counts above: n - (index of the run's last element + 1), exact integers until the division
            sf[pos : pos + c] = (n - 1 - lo - ends) / n
            xs[pos : pos + c] = xs[lo:hi][ends]  # pos <= lo: never overwrites a value not yet read
            pos += c
    del last
    v = xs[:u]
    if 2 * u <= n:
        v = v.copy()  # release the rest of the sorted copy
    return v, sf


def _merge_ties(v: np.ndarray, p: np.ndarray, presorted: bool = False):
    """Sort atoms and add up the probabilities of equal values."""
    if not presorted:
        order = np.argsort(v, kind="stable")
        v, p = v[order], p[order]
    if v.size == 0:
        raise InputError("values", "is empty")
    keep = np.empty(v.size, dtype=bool)
    keep[0] = True
    np.not_equal(v[1:], v[:-1], out=keep[1:])
    starts = np.flatnonzero(keep)
    return v[starts], np.add.reduceat(p, starts)


def _sf_from_probs(p: np.ndarray) -> np.ndarray:
    """P(X > v_i) by summing the probabilities above, from the top down (accurate in the tail)."""
    sf = np.zeros(p.size)
    if p.size > 1:
        sf[:-1] = np.cumsum(p[:0:-1])[::-1]
    total = sf[0] + p[0] if p.size else 1.0
    sf /= total  # renormalise exactly so the sf starts from a proper distribution
    return sf
