"""Allocating the portfolio's premium, margin and capital: to capital layers and to business units.

To layers. The capital structure's slices 0-b1, b1-b2, ..., bk-a of the annual
total X are comonotonic, so their premiums (integrals of g(S) over each
slice) add up to rho_g(X ∧ a), and their capitals (width - premium) to
a - rho_g(X ∧ a).

To units. With X = X_1 + ... + X_m and X discrete with atoms x_j, the natural
allocation of rho_g (Delbaen 2000, "Coherent risk measures", Scuola Normale
Superiore, Pisa; Tsanakas & Barnett 2003, "Risk
capital allocation and cooperative pricing of insurance liabilities",
Insurance: Mathematics and Economics 33) gives unit i

    sum_j E[X_i | X = x_j] q_j,   q_j = g(P(X >= x_j)) - g(P(X > x_j)),

the unit's expected loss under the distorted probabilities q of the total.
Atoms of X are handled by q itself: all outcomes with the same total share the
same distorted weight, so no derivative of g is needed.

Rules used here (amounts per year, currency units):

* paid loss. With assets a the portfolio pays X ∧ a; when X > a each unit is
  paid pro rata, X_i a / X (equal priority in default). Unit i's paid loss is
  X_i min(1, a / X), and these add up to X ∧ a.
* expected_loss_i = E[X_i min(1, a/X)];  premium_i = sum_j q_j E[X_i | X = x_j] min(1, a/x_j).
  Both add up to the portfolio's E[X ∧ a] and rho_g(X ∧ a).
* assets_i = a E[X_i / X | X >= a]: each unit's share of the assets in the
  years that use them all. This is the same natural allocation applied to
  the assets themselves, with the distortion g(s) = min(s / P(X >= a), 1)
  that prices X ∧ a at exactly a, so premium and assets are split by one rule
  and add up to a. (When a is above the largest loss, the largest atom is
  used: the limit of the rule as a falls to it.)
* capital_i = assets_i - premium_i (adds up to a - premium). It can be
  negative for a unit whose losses are low in the years when the total is
  high: such a unit supplies capital to the others rather than using it.

E[X_i | X = x] comes from one of two inputs:

* frequency-severity units on a common grid (same bucket): by FFT,
  E[X_i 1{X = x}] = ((x f_i) * f_others)(x), the convolution of the unit's
  x-weighted density with the density of the sum of the other units;
* joint simulated years (one column per unit, same years): by grouping the
  years on their total.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from .capital import CapitalStandard, _check_distortion, _check_standard, _economics, capital_layers, portfolio_distribution
from .distribution import LossDistribution
from .errors import InputError, as_array
from .models import MAX_SAMPLE_SIZE, FrequencySeverity, YearLossTable

__all__ = ["allocate_to_layers", "allocate_to_units", "natural_allocation", "UNIT_COLUMNS", "LAYER_COLUMNS"]

ROUNDOFF = 1e-15  # FFT probabilities below this are transform round-off (as in engine.fourier)
MAX_FFT_LENGTH = 2**22  # upper bound on the joint grid of all units (as engine.fourier's largest grid)
MAX_FFT_WORK = 2**24  # units x joint grid points: about 16 bytes each held in transforms, so <= 256 MB
UNIT_COLUMNS = ["unit", "expected_loss", "premium", "margin", "loss_ratio", "assets", "capital",
                "return_on_capital", "leverage"]
LAYER_COLUMNS = ["layer", "attachment", "limit", "expected_loss", "premium", "margin", "loss_ratio", "capital",
                 "return_on_capital", "leverage"]


# --------------------------------------------------------------------------- to layers
def allocate_to_layers(model, distortion, standard: CapitalStandard, breaks=(), *, total: bool = True) -> pd.DataFrame:
    """Premium, margin and capital of each capital slice 0-b1, ..., bk-assets, plus a ``total`` row.

    ``model`` is a LossModel (its ground-up annual total) or LossDistribution.
    Each slice [lo, hi) has expected loss integral_lo^hi S, premium
    integral_lo^hi g(S), capital (hi - lo) - premium; the total row is the
    portfolio at ``standard``.
    """
    dist = portfolio_distribution(model)
    g = _check_distortion(distortion)
    a = _check_standard(standard).assets(dist)
    lays = capital_layers(a, breaks)
    lo = np.array([x.agg_attachment for x in lays])
    width = np.array([x.agg_limit for x in lays])
    el = dist.layer_integral(lo, width)
    prem = dist.layer_integral(lo, width, g)
    rows = [_row(x.describe(), lo_, w, e, p) for x, lo_, w, e, p in zip(lays, lo, width, el, prem)]
    if total:
        rows.append(_row("total", 0.0, a, float(np.sum(el)), float(np.sum(prem))))
    return pd.DataFrame(rows, columns=LAYER_COLUMNS)


def _row(name, attachment, limit, el, prem):
    margin, capital, roc, lev, lr = _economics(float(el), float(prem), float(limit))
    return {"layer": name, "attachment": float(attachment), "limit": float(limit), "expected_loss": float(el),
            "premium": float(prem), "margin": margin, "loss_ratio": lr, "capital": capital,
            "return_on_capital": roc, "leverage": lev}


# --------------------------------------------------------------------------- the natural allocation
def natural_allocation(total: LossDistribution, conditional_means, distortion, assets: float) -> dict:
    """Natural allocation to units, given the total's distribution and E[X_i | X = x_j].

    ``total`` has atoms x_j (shape (n,)); ``conditional_means`` has shape
    (n, m): column i is E[X_i | X = x_j], rows adding up to x_j. Returns a dict
    of arrays of shape (m,): ``expected_loss``, ``premium``, ``assets`` (rules
    in the module docstring), and the portfolio's ``total_premium`` and
    ``total_expected_loss`` computed from ``total`` directly.
    """
    g = _check_distortion(distortion)
    if not isinstance(total, LossDistribution):
        raise InputError("total", f"expected a loss distribution, got {total!r}")
    x = total.values
    k = np.asarray(conditional_means, dtype=float)
    if k.ndim != 2 or k.shape[0] != x.size:
        raise InputError("conditional_means", f"needs shape ({x.size}, units), got {k.shape}")
    a = float(assets)
    if not a > 0:
        raise InputError("assets", f"must be positive, got {a!r}")
    p = total.probs
    s_gt = total.sf                                  # P(X > x_j)
    s_ge = np.concatenate([[1.0], total.sf[:-1]])    # P(X >= x_j), the previous atom's P(X > .)
    q = np.asarray(g(s_ge), dtype=float) - np.asarray(g(s_gt), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        cap = np.where(x > a, a / x, 1.0)            # pro-rata payment when the total exceeds the assets
    paid = k * cap[:, None]
    el = p @ paid
    prem = q @ paid
    # assets: a * E[X_i / X | X >= a]; above the largest loss use the largest atom (the rule's limit)
    hit = x >= a
    if not hit.any():
        hit = x == x[-1]
    w = p * hit
    share = (w[:, None] * k / np.where(x > 0, x, 1.0)[:, None]).sum(axis=0) / w.sum()
    return {
        "expected_loss": el,
        "premium": prem,
        "assets": a * share,
        "total_expected_loss": float(total.layer_integral(0.0, a)),
        "total_premium": float(total.layer_integral(0.0, a, g)),
    }


def _unit_frame(names, alloc, a) -> pd.DataFrame:
    rows = []
    for i, name in enumerate(names):
        el, prem, assets = float(alloc["expected_loss"][i]), float(alloc["premium"][i]), float(alloc["assets"][i])
        rows.append(_unit_row(name, el, prem, assets))
    rows.append(_unit_row("total", alloc["total_expected_loss"], alloc["total_premium"], a))
    return pd.DataFrame(rows, columns=UNIT_COLUMNS)


def _unit_row(name, el, prem, assets):
    margin = prem - el
    capital = assets - prem
    with np.errstate(divide="ignore", invalid="ignore"):
        roc = margin / capital if capital != 0 else math.nan
        lev = prem / capital if capital != 0 else math.nan
    return {"unit": str(name), "expected_loss": el, "premium": prem, "margin": margin,
            "loss_ratio": el / prem if prem > 0 else math.nan, "assets": assets, "capital": capital,
            "return_on_capital": roc, "leverage": lev}


# --------------------------------------------------------------------------- inputs
def allocate_to_units(units, distortion, standard: CapitalStandard, *, weights=None, names=None) -> pd.DataFrame:
    """Natural allocation of the portfolio's premium, margin and capital to independent or jointly simulated units.

    ``units`` is one of:

    * a list (or dict name -> model) of :class:`FrequencySeverity` models on
      one grid: the same bucket for all (build them with an explicit
      ``bucket=``); the units are independent and summed by FFT;
    * a table of jointly simulated annual losses, shape (years, units): a
      DataFrame (column names become unit names) or a 2-D array, with optional
      ``weights`` per year; or a list/dict of :class:`YearLossTable` of the
      same simulated years (row i of each is the same year).

    ``standard`` sets the assets of the total. Returns one row per unit and a
    final ``total`` row (the portfolio at ``standard``), with columns
    :data:`UNIT_COLUMNS`; unit rows add up to the total row.
    ``frame.attrs`` holds ``assets``, ``standard`` and, for grid units,
    ``beyond`` (probability the units' grids held at their tops).
    """
    g = _check_distortion(distortion)
    std = _check_standard(standard)
    attrs = {}
    label_names = None
    if isinstance(units, pd.DataFrame):
        label_names = [str(c) for c in units.columns]
        total, kappa = _sample_conditional_means(_as_table(units.to_numpy()), weights)
    elif isinstance(units, np.ndarray):
        total, kappa = _sample_conditional_means(_as_table(units), weights)
    elif isinstance(units, (Mapping, Sequence)) and not isinstance(units, str) and len(units) > 0:
        if isinstance(units, Mapping):
            label_names, items = [str(k) for k in units], list(units.values())
        else:
            items = list(units)
        if all(isinstance(m, FrequencySeverity) for m in items):
            if label_names is None:
                label_names = [f"unit {i + 1}" for i in range(len(items))]
            total, kappa, beyond = _grid_conditional_means(items)
            attrs["beyond"] = beyond
        elif all(isinstance(m, YearLossTable) for m in items):
            table, weights = _stack_year_loss_tables(items, weights)
            total, kappa = _sample_conditional_means(table, weights)
        elif isinstance(units, Mapping):  # name -> that unit's annual losses (a column)
            cols = [as_array(v, "units", low=0.0) for v in items]
            if len({c.size for c in cols}) != 1:
                raise InputError("units", "every unit needs one annual loss per simulated year (columns of equal length)")
            total, kappa = _sample_conditional_means(_as_table(np.column_stack(cols)), weights)
        else:  # rows of a table, as a cell range gives them: years x units
            total, kappa = _sample_conditional_means(_as_table(_rows(items)), weights)
    else:
        raise InputError("units", "expected frequency-severity models on one grid, year loss tables of the same years, "
                                  "or a table of annual losses (years x units)")
    if names is not None:
        label_names = [str(n) for n in names]
        if len(label_names) != kappa.shape[1]:
            raise InputError("names", f"needs one name per unit ({kappa.shape[1]}), got {len(label_names)}")
    if label_names is None or len(label_names) != kappa.shape[1]:
        label_names = [f"unit {i + 1}" for i in range(kappa.shape[1])]
    a = std.assets(total)
    alloc = natural_allocation(total, kappa, g, a)
    out = _unit_frame(label_names, alloc, a)
    out.attrs.update(assets=a, standard=std.label(), **attrs)
    return out


def _rows(items):
    try:
        return np.asarray(items, dtype=float)
    except (TypeError, ValueError):
        raise InputError("units", "expected frequency-severity models, year loss tables or rows of numbers") from None


def _as_table(values) -> np.ndarray:
    try:
        t = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise InputError("units", "the loss table must hold numbers only") from None
    if t.ndim != 2 or t.shape[0] < 1 or t.shape[1] < 1:
        raise InputError("units", f"a loss table needs shape (years, units), got shape {t.shape}")
    if t.size > MAX_SAMPLE_SIZE:
        raise InputError("units", f"at most {MAX_SAMPLE_SIZE:,} cells, got {t.size:,}")
    if not np.all(np.isfinite(t)):
        raise InputError("units", "the loss table contains NaN or infinite values")
    if t.min() < 0:
        raise InputError("units", f"losses must be >= 0, smallest is {t.min():.6g}")
    return t


def _stack_year_loss_tables(items, weights):
    n = items[0].losses.size
    for m in items:
        if m.losses.size != n:
            raise InputError("units", f"year loss tables must cover the same simulated years; got {n} and {m.losses.size} years")
    ws = [m.weights for m in items]
    if any(w is not None for w in ws):
        w0 = ws[0]
        if any(w is None or not np.array_equal(w, w0) for w in ws):
            raise InputError("weights", "year loss tables of the same years must carry the same weights")
        if weights is None:
            weights = w0
    return np.column_stack([m.losses for m in items]), weights


def _sample_conditional_means(table: np.ndarray, weights):
    """Total's distribution and E[X_i | X = x_j] from joint simulated years, by grouping on the total."""
    years = table.shape[0]
    if weights is None:
        w = np.ones(years)
    else:
        w = as_array(weights, "weights", low=0.0)
        if w.size != years:
            raise InputError("weights", f"needs one weight per year ({years}), got {w.size}")
        if not w.sum() > 0:
            raise InputError("weights", "must not all be zero")
    x = table.sum(axis=1)
    total = LossDistribution.from_sample(x, None if weights is None else w, argument="units")
    vals, inv = np.unique(x, return_inverse=True)  # the same atoms as the total's, in the same order
    if vals.size != total.size or not np.array_equal(vals, total.values):  # pragma: no cover - defensive
        raise InputError("units", "could not group the years on their totals")
    mass = np.bincount(inv, weights=w, minlength=vals.size)
    kappa = np.column_stack([np.bincount(inv, weights=w * table[:, i], minlength=vals.size) for i in range(table.shape[1])])
    with np.errstate(invalid="ignore", divide="ignore"):
        kappa = kappa / mass[:, None]
    # the group means add up to the total to rounding; rescale so they do exactly
    kappa = _rescale_rows(kappa, total.values)
    return total, kappa


def _rescale_rows(kappa: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Non-negative rows scaled to add up to x exactly (rows of zeros split equally)."""
    kappa = np.clip(np.nan_to_num(kappa, nan=0.0), 0.0, None)
    s = kappa.sum(axis=1)
    m = kappa.shape[1]
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(s[:, None] > 0, kappa * (x / s)[:, None], (x / m)[:, None])
    return out


def _grid_density(dist: LossDistribution, h: float) -> np.ndarray:
    """Grid probabilities f[k] = P(X = k h), beyond-grid mass kept at its top index."""
    idx = np.rint(dist.values / h).astype(np.int64)
    if np.any(np.abs(idx * h - dist.values) > 1e-9 * np.maximum(dist.values, h)):
        raise InputError("units", "a unit's distribution is not on its grid")
    f = np.zeros(int(idx[-1]) + 1)
    f[idx] = dist.probs
    return f


def _grid_conditional_means(models):
    """Sum of independent grid units by FFT, and E[X_i | X = x] from ((x f_i) * f_others)(x)."""
    models = [m.uniform_grid() for m in models]  # one bucket over each unit's whole grid
    grids = [m.grid() for m in models]
    h = grids[0][0]
    for (hi, _), m in zip(grids, models):
        if abs(hi - h) > 1e-12 * h:
            raise InputError("units", f"all units need the same bucket; got {h:g} and {hi:g} "
                                      "(build each FrequencySeverity with the same bucket=)")
    # each unit lives on indices 0..n (n: its grid top, where beyond-grid mass is held)
    bound = sum(n for _, n in grids) + 1
    size = 1 << max(int(math.ceil(math.log2(bound))), 4)
    if size > MAX_FFT_LENGTH or size * len(models) > MAX_FFT_WORK:
        raise InputError("units", f"{len(models)} units on a joint grid of {size:,} points is too much work "
                                  f"(at most {MAX_FFT_LENGTH:,} points and {MAX_FFT_WORK:,} unit-points); "
                                  "use a coarser bucket or fewer grid points")
    dists = [m.annual() for m in models]
    dens = [_grid_density(d, h) for d in dists]
    length = sum(f.size - 1 for f in dens) + 1  # largest total index + 1: no wrap-around
    ft = [np.fft.rfft(f, size) for f in dens]
    # product of the other units' transforms: prefix products kept, suffix product carried down
    # (no division, so zeros of a transform are harmless)
    prefix = [None] * len(ft)
    run = np.ones_like(ft[0])
    for i, t in enumerate(ft):
        prefix[i] = run
        run = run * t
    joint = run
    f_total = np.fft.irfft(joint, size)[:length]
    nums = [None] * len(ft)
    suffix = np.ones_like(ft[0])
    for i in range(len(ft) - 1, -1, -1):
        xf = dens[i] * (np.arange(dens[i].size) * h)
        nums[i] = np.fft.irfft(np.fft.rfft(xf, size) * prefix[i] * suffix, size)[:length]
        suffix = suffix * ft[i]
        prefix[i] = None
    num = np.column_stack(nums)
    keep = f_total > ROUNDOFF
    keep[0] = keep[0] or f_total[0] > 0
    xs = np.flatnonzero(keep) * h
    probs = f_total[keep]
    total = LossDistribution.from_atoms(xs, probs / probs.sum(), sorted_unique=True,
                                        diagnostics={"bucket": h, "grid_length": length})
    with np.errstate(invalid="ignore", divide="ignore"):
        kappa = num[keep] / probs[:, None]
    kappa = _rescale_rows(kappa, xs)
    beyond = 1.0 - float(np.prod([1.0 - d.beyond for d in dists]))
    return total, kappa, beyond
