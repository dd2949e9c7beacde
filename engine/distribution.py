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

import numpy as np

from .errors import InputError, as_array

__all__ = ["LossDistribution"]

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
        out = self._tail_integrals(x, ((distortion, power),))[0]
        return out if out.ndim else float(out)

    def _tail_integrals(self, x: np.ndarray, specs, *, differences: bool = False) -> list:
        """One pass over the atoms for several integrands: ``[tail_integral(x, g, p) for g, p in specs]``.

        The sums run over the segments between consecutive query points
        (``np.add.reduceat``, pairwise and vectorised), and those few partial
        sums are then accumulated from the top down, so high layers keep their
        relative precision. Only segments at or above the lowest query point
        take part, so g is evaluated once per distinct distortion on those
        atoms alone; beyond ``_BLOCK`` of them they are visited in blocks
        (each block's edge is one more query point), so no temporary is larger
        than a block.

        With ``differences`` only differences between the results are wanted
        (layer integrals): the sums then start at the highest atom any query
        needs rather than at the top, so atoms above every layer cost
        nothing, and each result is off by one common constant.
        """
        v = self.values
        n = v.size
        xf = np.minimum(x.ravel(), v[-1])
        j = np.searchsorted(v, xf, side="right") - 1  # the segment [v[j], v[j + 1]) holding each point
        head = j < 0  # below the first atom, where g(S) = g(1) = 1
        has_head = bool(head.any())
        j = np.maximum(j, 0)
        jn = np.minimum(j + 1, n - 1)
        step = jn > j  # False at the last atom: a zero-width part, whatever g(S) is looked up there
        # above[k] = integral over [v[k], inf) is needed at jn (and at 0 below the first atom)
        q_above = np.append(jn, 0) if has_head else jn
        used = n if not differences else int(q_above.max()) + 1  # atoms 0 .. used - 1 take part
        k, m = len(specs), xf.size
        if used < 2:  # a single atom: only the part below it has width
            above_q, lev_q = np.zeros((k, q_above.size)), np.zeros((k, m))
        else:
            above_q, lev_q = self._running_sums(specs, q_above, np.minimum(j, used - 2), used)
        vjn = v[jn]
        squared = [t for t, (_, power) in enumerate(specs) if power == 1]
        widths = np.empty((k, m))
        widths[:] = vjn - xf
        if squared:
            widths[squared] = 0.5 * (vjn**2 - xf**2)  # 0.5 x exact: same bits as before
        widths *= lev_q
        out = np.where(step, above_q[:, :m] + widths, 0.0)
        if has_head:
            heads = np.empty((k, m))
            heads[:] = v[0] - xf
            if squared:
                heads[squared] = 0.5 * (v[0] ** 2 - xf**2)
            heads += above_q[:, m : m + 1]
            out[:, head] = heads[:, head]
        out[:, x.ravel() >= v[-1]] = 0.0
        return list(out.reshape((k,) + x.shape))

    def _running_sums(self, specs, q_above, q_lev, used):
        """For each integrand, the sum over segments s in [q, used - 1) of g(S_s) times the segment's
        width (or half its change of t**2), at each q in ``q_above``; and g(S) at each index in ``q_lev``.
        Shapes (len(specs), q_above.size) and (len(specs), q_lev.size)."""
        v, sf = self.values, self.sf
        hi = used - 1  # segments 0 .. hi - 1; segment s is [v[s], v[s + 1])
        lo = int(min(q_above.min(), q_lev.min()))  # no query reads a segment below this one
        starts = np.unique(q_above[q_above < hi])
        block = hi - lo if hi - lo <= _BLOCK else min(_BLOCK, max(_MIN_BLOCK, (hi - lo) // 16))
        edges = np.arange(lo, hi, block)
        if edges.size > 1 and starts.size:
            # every block edge above the lowest start is a start too, so no partial sum crosses a block
            starts = np.union1d(starts, edges[edges > starts[0]])
        rows: dict = {}
        for g, _ in specs:
            rows.setdefault(id(g), g)
        which = [list(rows).index(id(g)) for g, _ in specs]
        k = len(specs)
        sums = np.zeros((k, starts.size))
        lev_q = np.zeros((k, q_lev.size))
        for b0 in edges:
            b1 = min(b0 + block, hi)
            s = sf[b0:b1]
            levels = np.empty((len(rows), b1 - b0))
            interior = s[0] < 1.0 and s[-1] > 0.0  # sf is non-increasing: all of s in (0, 1)
            for r, g in enumerate(rows.values()):
                if g is None:
                    levels[r] = s
                else:  # a constant g broadcasts; plain functions (no ``inside``) are called as they are
                    lean = getattr(g, "inside", None) if interior else None
                    levels[r] = lean(s) if lean is not None else np.asarray(g(s), dtype=float)
            i0, i1 = np.searchsorted(starts, (b0, b1))
            if i1 > i0:
                lv = v[b0 : b1 + 1]
                width = lv[1:] - lv[:-1]
                prod = np.empty((k, b1 - b0))
                for t, (_, power) in enumerate(specs):
                    np.multiply(levels[which[t]], width if power == 0 else 0.5 * (lv[1:] ** 2 - lv[:-1] ** 2), out=prod[t])
                sums[:, i0:i1] = np.add.reduceat(prod, starts[i0:i1] - b0, axis=1)
            inside = (q_lev >= b0) & (q_lev < b1)
            if edges.size == 1:
                lev_q = levels[which][:, q_lev - b0]
            elif inside.any():
                lev_q[:, inside] = levels[which][:, q_lev[inside] - b0]
        above = np.cumsum(sums[:, ::-1], axis=1)[:, ::-1]  # above[:, i]: from starts[i] to the top
        above_q = np.zeros((k, q_above.size))
        if starts.size:
            read = q_above < hi
            above_q[:, read] = above[:, np.searchsorted(starts, q_above[read])]
        return above_q, lev_q

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
        :meth:`layer_integral`.
        """
        a = np.asarray(attachment, dtype=float)
        top = a + np.asarray(limit, dtype=float)
        if a.shape != top.shape:
            a, top = np.broadcast_arrays(a, top)
        shape = a.shape
        specs = [(None, 0)] + ([(None, 1)] if second_moment else []) + [(g, 0) for g in distortions if g is not None]
        xs = np.concatenate([a.ravel(), top.ravel()])
        res = self._tail_integrals(xs, specs, differences=True)
        m = a.size

        def diff(r):
            out = (r[:m] - r[m:]).reshape(shape)
            return out if out.ndim else float(out)

        first = diff(res[0])
        sm = None
        if second_moment:
            second = diff(res[1])
            sm = np.maximum(2.0 * (second - a * first), 0.0)
            sm = sm if sm.ndim else float(sm)
        rest = iter(res[2 if second_moment else 1 :])
        prices = [first if g is None else diff(next(rest)) for g in distortions]
        return first, sm, prices

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
        gb = self.beyond if distortion is None else float(distortion(self.beyond))
        overlap = np.maximum(t - np.maximum(a, self.top), 0.0)
        with np.errstate(invalid="ignore"):
            return np.where(overlap > 0, gb * overlap, 0.0)

    def __repr__(self):
        extra = f", beyond={self.beyond:.3g} at {self.top:.6g}" if self.beyond > 0 else ""
        return f"LossDistribution({self.size} atoms on [{self.values[0]:.6g}, {self.values[-1]:.6g}], mean={self.mean():.6g}{extra})"


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
