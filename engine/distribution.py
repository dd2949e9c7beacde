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

__all__ = ["LossDistribution", "layer_profiles"]

_IDENTITY = None  # a distortion argument of None means g(s) = s (the expected value)
QUANTILE_TOL = 1e-12  # probability slack when inverting the cdf, so equal-weight samples hit exact order statistics
_BLOCK = 1 << 16  # atoms per integral pass: bounds its temporaries and keeps them in cache
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

        Each is a direct sum over its own segments, so high layers keep their relative precision.
        """
        x = np.asarray(x, dtype=float)
        out = _integrals([(self, x, np.full(x.shape, math.inf))], ((distortion, power),))[0][0]
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
    spans = []
    for d, attachment, limit in items:
        a = np.asarray(attachment, dtype=float)
        b = a + np.asarray(limit, dtype=float)
        if a.shape != b.shape:
            a, b = np.broadcast_arrays(a, b)
        spans.append((d, a, b))
    specs = [(None, 0)] + ([(None, 1)] if second_moment else []) + [(g, 0) for g in distortions if g is not None]
    out = []
    for (_, a, _), res in zip(spans, _integrals(spans, specs)):
        first = res[0]
        sm = None
        if second_moment:
            sm = _scalar(np.maximum(2.0 * (res[1] - a * first), 0.0))
        rest = iter(res[2 if second_moment else 1 :])
        first = _scalar(first)
        out.append((first, sm, [first if g is None else _scalar(next(rest)) for g in distortions]))
    return out


def _scalar(x: np.ndarray):
    return x if x.ndim else float(x)


def _integrals(items, specs) -> list:
    """For each (distribution, lo, hi) in ``items`` (arrays of one shape; hi may be inf), the integrals
    over [lo, hi] of t**p g(S(t)), one array per (g, p) in ``specs``.

    S is 1 below the first atom and sf[i] on [values[i], values[i + 1]). Each
    integral is its two partial segments plus the sum over the whole segments
    between them, taken directly (``np.add.reduceat`` on pairs of indices:
    pairwise, vectorised, no differences of running sums, so a remote layer
    keeps its relative precision). g is evaluated once per distinct
    distortion and pass, on the atoms from an item's lowest bound to its
    highest alone; a pass holds several short items, up to ``_BLOCK`` atoms,
    while an item longer than that (a large sample) is cut into blocks of
    1/16 of its length that pass one at a time, so temporaries stay well below
    its size. An item's numbers do not depend on which items share its pass.
    """
    if not items:
        return []
    rows: dict = {}
    for g, _ in specs:
        rows.setdefault(id(g), g)
    which = [list(rows).index(id(g)) for g, _ in specs]
    squared = [t for t, (_, power) in enumerate(specs) if power == 1]
    k = len(specs)
    # every item's bounds side by side: item i owns columns cols[i] .. cols[i + 1] - 1
    sizes = [lo.size for _, lo, _ in items]
    cols = np.concatenate([[0], np.cumsum(sizes)]).astype(np.intp)
    lo_c = np.concatenate([np.minimum(lo.ravel(), d.values[-1]) for d, lo, _ in items])  # S = 0 past the last atom
    hi_c = np.maximum(np.concatenate([np.minimum(hi.ravel(), d.values[-1]) for d, _, hi in items]), lo_c)
    j_lo = np.empty(lo_c.size, dtype=np.intp)  # segment of each bound; -1 below the first atom
    j_hi = np.empty(lo_c.size, dtype=np.intp)
    regions = []  # (item, b0, b1, long): atoms b0 .. b1 - 1 of an item, whose levels one pass computes
    for i, (d, _, _) in enumerate(items):
        c0, c1 = cols[i], cols[i + 1]
        j = np.searchsorted(d.values, np.concatenate([lo_c[c0:c1], hi_c[c0:c1]]), side="right") - 1
        j_lo[c0:c1], j_hi[c0:c1] = j[: c1 - c0], j[c1 - c0 :]
        r0, r1 = max(int(j_lo[c0:c1].min()), 0), int(j_hi[c0:c1].max()) + 1  # g(S) is needed on atoms r0 .. r1 - 1
        if r1 <= r0:
            continue  # every bound below the first atom
        n = d.values.size
        if n <= _BLOCK + 1:
            regions.append((i, r0, r1, False))
        else:
            block = min(_BLOCK, max(_MIN_BLOCK, n // 16))
            regions.extend((i, b0, min(b0 + block, r1), True) for b0 in range(r0, r1, block))
    middle = np.zeros((k, lo_c.size))
    lev_lo = np.ones((k, lo_c.size))  # g(S) = g(1) = 1 below the first atom
    lev_hi = np.ones((k, lo_c.size))
    bounds = (cols, j_lo, j_hi, middle, lev_lo, lev_hi)
    # a block of a long item passes alone; whole short items share passes of up to _BLOCK atoms
    group, size = [], 0
    for r in regions:
        _, b0, b1, long = r
        if long:
            _pass([r], items, bounds, rows, which, specs)
            continue
        if group and size + b1 - b0 > _BLOCK:
            _pass(group, items, bounds, rows, which, specs)
            group, size = [], 0
        group.append(r)
        size += b1 - b0
    if group:
        _pass(group, items, bounds, rows, which, specs)
    # the partial segments at the bounds
    right = np.concatenate([d.values[np.minimum(j_lo[cols[i] : cols[i + 1]] + 1, d.values.size - 1)]
                            for i, (d, _, _) in enumerate(items)])  # the end of the lower bound's segment
    left = np.concatenate([d.values[np.maximum(j_hi[cols[i] : cols[i + 1]], 0)]
                           for i, (d, _, _) in enumerate(items)])  # the start of the upper bound's segment
    one = j_lo == j_hi  # both bounds in one segment
    end = np.where(one, hi_c, right)  # where the lower bound's part ends
    part_lo = np.empty_like(middle)
    part_hi = np.empty_like(middle)
    part_lo[:] = end - lo_c
    part_hi[:] = np.where(one, 0.0, hi_c - left)
    if squared:
        part_lo[squared] = 0.5 * (end**2 - lo_c**2)
        part_hi[squared] = np.where(one, 0.0, 0.5 * (hi_c**2 - left**2))
    res = part_lo * lev_lo + part_hi * lev_hi + middle
    return [list(res[:, cols[i] : cols[i + 1]].reshape((k,) + lo.shape)) for i, (_, lo, _) in enumerate(items)]


def _pass(group, items, bounds, rows, which, specs):
    """g on the survival levels of the regions in ``group`` (atoms b0 .. b1 - 1 of an item), the
    products with the segments' widths, and each bound pair's sum over its whole segments; adds the
    sums to ``middle`` and sets the levels at the bounds held here (see :func:`_integrals`)."""
    cols, j_lo, j_hi, middle, lev_lo, lev_hi = bounds
    need_squares = any(power == 1 for _, power in specs)
    # each region's levels, segment widths (and half differences of squares) written side by side, plus one
    # slot of width 0 after it: where a pair ending at b1 stops
    # one slice of levels and of atoms per region, joined: the levels plus the region's last one again (the
    # slot's, so g sees no new value); the atoms b0 .. b1 (at most to the last atom, then repeated), whose
    # differences within the region are the segments' widths (0 past the last atom)
    level_parts, atom_parts, where, ends = [], [], [], []
    interior = True  # all of s in (0, 1): each region is non-increasing, so its ends decide
    pos = 0
    for i, b0, b1, _ in group:
        d = items[i][0]
        v, sf = d.values, d.sf
        level_parts += [sf[b0:b1], sf[b1 - 1 : b1]]
        interior = interior and sf[b0] < 1.0 and sf[b1 - 1] > 0.0
        top = min(b1, v.size - 1)  # segments end at the last atom
        atom_parts.append(v[b0 : top + 1])
        if top < b1:
            atom_parts.append(v[top : top + 1])
        where.append(pos - b0)  # atom a of this region sits at a + where in the pass
        pos += b1 - b0 + 1
        ends.append(pos - 1)
    at = pos
    s = np.concatenate(level_parts)
    atoms = atom_parts[0] if len(atom_parts) == 1 else np.concatenate(atom_parts)  # a view for a lone block
    width = np.empty(at)
    np.subtract(atoms[1:], atoms[:-1], out=width[:-1])
    width[ends] = 0.0  # the slots (and nothing across regions)
    square = None
    if need_squares:
        sq = atoms**2
        square = np.empty(at)
        np.subtract(sq[1:], sq[:-1], out=square[:-1])
        del sq  # temporaries go before the levels are made: a long sample's peak memory
        square[-1] = 0.0
        square *= 0.5
        square[ends] = 0.0
    del atoms
    levels = np.empty((len(rows), at))
    for r, g in enumerate(rows.values()):
        if g is None:
            levels[r] = s
        else:  # a constant g broadcasts; plain functions (no ``inside``) are called as they are
            lean = getattr(g, "inside", None) if interior else None
            levels[r] = lean(s) if lean is not None else np.asarray(g(s), dtype=float)
    # each pair of bounds: its whole segments j_lo + 1 .. j_hi - 1, clipped to the region
    if group[0][3]:  # a block of a long item (it passes alone)
        i, b0, b1, _ = group[0]
        cidx = np.arange(cols[i], cols[i + 1])
        jl, jh = j_lo[cidx], j_hi[cidx]
        shift = where[0]
        s0 = np.minimum(np.maximum(jl + 1, b0), b1) + shift
        s1 = np.minimum(np.maximum(jh, b0), b1) + shift
        inside_lo, inside_hi = (jl >= b0) & (jl < b1), (jh >= b0) & (jh < b1)
    else:  # whole items: each region holds every bound of its item
        cidx = np.concatenate([np.arange(cols[i], cols[i + 1]) for i, _, _, _ in group])
        jl, jh = j_lo[cidx], j_hi[cidx]
        shift = np.repeat(where, [cols[i + 1] - cols[i] for i, _, _, _ in group])
        s0, s1 = jl + 1 + shift, jh + shift
        inside_lo, inside_hi = jl >= 0, jh >= 0
    ok = s0 < s1  # an empty pair may point anywhere: it reads a valid index and is dropped
    s0, s1 = np.where(ok, s0, 0), np.where(ok, s1, 0)
    # pairs by descending start: every index after a pair's end is at or below it, so reduceat's
    # in-between entries are single elements and the work is one sweep of the pass
    order = np.argsort(-s0, kind="stable")
    index = np.zeros(2 * s0.size + 1, dtype=np.intp)
    index[0:-1:2], index[1:-1:2] = s0[order], s1[order]
    term = np.empty(at)  # one integrand's terms at a time: temporaries of a few rows of the pass
    sums = np.empty((len(specs), s0.size))
    for t, (_, power) in enumerate(specs):
        np.multiply(levels[which[t]], width if power == 0 else square, out=term)
        sums[t, order] = np.add.reduceat(term, index)[0:-1:2]
    middle[:, cidx] += np.where(ok, sums, 0.0)
    for j, lev, inside in ((jl, lev_lo, inside_lo), (jh, lev_hi, inside_hi)):
        pick = np.flatnonzero(inside)
        if pick.size:
            lev[:, cidx[pick]] = levels[:, (j + shift)[pick]][which]

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
    sf = np.empty(p.size)
    if p.size:
        sf[-1] = 0.0
        np.cumsum(p[:0:-1], out=sf[-2::-1])  # written in place, top down
    total = sf[0] + p[0] if p.size else 1.0
    sf /= total  # renormalise exactly so the sf starts from a proper distribution
    return sf
