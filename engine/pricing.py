"""Spectral prices and layer economics for whole towers in one call.

``price_layers(model, layers, distortion)`` returns one row per layer with the
quantities a pricing sheet shows. Conventions (all amounts before any
expense or brokerage load, in the model's currency):

* expected_loss   E[L], L the layer's annual loss after share
* premium         rho_g(L) = integral of g(S_L(x)) dx (the technical, risk-loaded price)
* margin          premium - expected_loss
* loss_ratio      expected_loss / premium
* rate_on_line    premium / (share * limit); limit is per occurrence for occurrence layers
* collateral      share * largest annual loss of the layer (aggregate limit), inf if unbounded
* capital         collateral - premium (the layer fully collateralised)
* return_on_capital  margin / capital;  leverage  premium / capital
* std, cv         of L; prob_attach P(L > 0); prob_exhaust P(layer pays its full
                  aggregate limit), or P(annual loss >= one full limit) when the aggregate is unlimited
* grid_error      error of premium from probability beyond a grid's top (0 for samples): for a
                  layer that ends above the top, the largest possible one (g(beyond) x the part of
                  the layer above the top); for an unlimited layer, an estimate of the price of the
                  part above the top (see ``LossModel.beyond_tail``), inf when that may be infinite
* discretisation_error  estimate of the error of premium and expected loss from the grid's bucket:
                  the larger of their changes when the severity is discretised at twice the bucket
                  (0 for samples and scenario tables)
* warning         empty when the numbers are within their tolerances, else the reasons (text):
                  grid_error > BEYOND_TOLERANCE x premium, discretisation_error >
                  DISCRETISATION_TOLERANCE x premium, or a grid severity mean that differs from the
                  exact one (up to the grid top) by more than MEAN_TOLERANCE relative. A table with a
                  warning also issues a :class:`~layerwise.engine.errors.GridWarning`.

An unlimited layer on a model with an infinite mean (a severity such as Pareto with
shape <= 1 or generalized Pareto with shape >= 1) has an infinite expected loss and is
refused with an InputError; a layer with a finite limit on the same model prices.

Layers with the same per-occurrence terms share one annual distribution, so a
tower of aggregate layers costs one model build plus O(n + k log n).
"""
from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Iterable, Mapping

import numpy as np
import pandas as pd

from .distortions import Distortion, TVaRDistortion
from .distribution import layer_profiles
from .errors import GridWarning, InputError
from .layers import Layer
from .models import LossModel

__all__ = ["price_layers", "layer_statistics", "price_layer", "COLUMNS", "BEYOND_TOLERANCE", "DISCRETISATION_TOLERANCE",
           "MEAN_TOLERANCE"]

BEYOND_TOLERANCE = 1e-6  # grid_error relative to premium
DISCRETISATION_TOLERANCE = 1e-4  # discretisation_error relative to premium
MEAN_TOLERANCE = 1e-4  # |grid severity mean / exact severity mean (to the grid top) - 1|
try:  # pandas' own text dtype ("str") in its Python storage: built several times faster than from lists
    _TEXT = pd.StringDtype("python", na_value=np.nan)
except TypeError:  # pandas before 2.3: text columns stay object
    _TEXT = None
try:  # pandas 3: a frame from its blocks as they are, without inferring each column's type again
    from pandas.api.internals import create_dataframe_from_blocks as _from_blocks
except ImportError:  # pragma: no cover - older pandas
    _from_blocks = None

COLUMNS = [
    "layer", "attachment", "limit", "share", "expected_loss", "premium", "margin", "loss_ratio",
    "rate_on_line", "collateral", "capital", "return_on_capital", "leverage", "std", "cv",
    "prob_attach", "prob_exhaust", "grid_error", "discretisation_error", "warning",
]


def _as_layers(layers) -> list[Layer]:
    if isinstance(layers, Layer):
        return [layers]
    if isinstance(layers, pd.DataFrame):
        return _layers_from_frame(layers)
    if not isinstance(layers, Iterable):
        raise InputError("layers", f"expected a Layer or a list of layers, got {layers!r}")
    out = list(layers)
    if not out:
        raise InputError("layers", "is empty")
    for x in out:
        if not isinstance(x, Layer):
            raise InputError("layers", f"expected Layer objects, got {x!r}")
    return out


def _layers_from_frame(df: pd.DataFrame) -> list[Layer]:
    """Layers from a table with columns attachment, limit and optionally share, basis, reinstatements."""
    missing = {"attachment", "limit"} - set(df.columns)
    if missing:
        raise InputError("layers", f"table needs columns attachment and limit; missing {sorted(missing)}")
    out = []
    for row in df.itertuples(index=False):
        r = row._asdict()
        basis = r.get("basis", "occurrence")
        if basis is None or (isinstance(basis, float) and math.isnan(basis)):
            basis = "occurrence"  # a blank cell: the default
        basis = str(basis).strip().lower()
        if basis not in ("occurrence", "aggregate"):
            raise InputError("basis", f"must be 'occurrence' or 'aggregate', got {r.get('basis')!r}")
        share = r.get("share", 1.0)
        if basis == "aggregate":
            out.append(Layer.aggregate(r["attachment"], r["limit"], share=share))
        else:
            rein = r.get("reinstatements")
            rein = None if rein is None or (isinstance(rein, float) and math.isnan(rein)) else rein
            out.append(Layer.occurrence(r["attachment"], r["limit"], reinstatements=rein, share=share))
    if not out:
        raise InputError("layers", "is empty")
    return out


def _groups(layers: list[Layer]):
    groups: dict[tuple, list[int]] = {}
    for i, lay in enumerate(layers):
        groups.setdefault((lay.occ_attachment, lay.occ_limit), []).append(i)
    return groups


def price_layers(model: LossModel, layers, distortion) -> pd.DataFrame:
    """Price every layer of ``layers`` on ``model`` with ``distortion`` (or a dict name -> distortion).

    Returns a DataFrame with the columns in ``COLUMNS`` (one row per layer), and
    a leading ``distortion`` column when several distortions are given.
    Everything that does not depend on the distortion (expected loss, std,
    probabilities) is computed once, and each group of layers sharing
    per-occurrence terms is priced under every distortion in one pass over its
    distribution.
    """
    if not isinstance(model, LossModel):
        raise InputError("model", f"expected a loss model, got {model!r}")
    lays = _as_layers(layers)
    if isinstance(distortion, Mapping):
        if not distortion:
            raise InputError("distortion", "no distortions given")
        names, gs = list(distortion.keys()), list(distortion.values())
    else:
        names, gs = None, [distortion]
    for g in gs:
        if not isinstance(g, Distortion):
            raise InputError("distortion", f"expected a distortion, got {g!r}")

    k, d = len(lays), len(gs)
    _check_finite_mean(model, lays)
    el = np.empty(k); sd = np.empty(k); pa = np.empty(k); pe = np.empty(k)
    prem = np.empty((d, k)); err = np.empty((d, k)); disc = np.zeros((d, k))
    mean_note = [""] * k
    groups = []
    for (oa, ol), idx in _groups(lays).items():
        a = np.array([lays[i].agg_attachment for i in idx])
        lim = np.array([lays[i].agg_limit for i in idx])
        below = float(np.max(a + lim))  # nothing above the highest exhaustion point is read
        groups.append((oa, ol, idx, a, lim, below))
    # every group's distribution and its error-estimate twin (a grid model builds them together)
    pairs = model.annual_pairs([(oa, ol, below) for oa, ol, _, _, _, below in groups])
    groups = [(oa, ol, idx, a, lim, u, coarse) for (oa, ol, idx, a, lim, _), (u, coarse) in zip(groups, pairs)]
    # every group's layers, and their error-estimate twins, in shared passes
    profiles = layer_profiles([(u, a, lim) for _, _, _, a, lim, u, _ in groups]
                              + [(c, a, lim) for _, _, _, a, lim, _, c in groups if c is not None], gs)
    fine, twins = profiles[: len(groups)], profiles[len(groups) :]
    share = np.array([x.share for x in lays])
    # the layer-by-layer numbers of all groups at once, in the groups' order of rows
    rows = np.concatenate([idx for _, _, idx, _, _, _, _ in groups])
    e = np.concatenate([mean for mean, _, _ in fine])
    second = np.concatenate([moment for _, moment, _ in fine])
    p = np.concatenate([np.asarray(prices, dtype=float).reshape(d, -1) for _, _, prices in fine], axis=1)
    row_share = share[rows]
    el[rows] = row_share * e
    sd[rows] = row_share * np.sqrt(np.maximum(second - e * e, 0.0))
    prem[:, rows] = row_share * p
    if twins:  # the rows of the groups with an error-estimate twin, in the twins' order
        twinned = np.concatenate([np.full(len(idx), c is not None) for _, _, idx, _, _, _, c in groups])
        ec = np.concatenate([mean for mean, _, _ in twins])
        pc = np.concatenate([np.asarray(prices, dtype=float).reshape(d, -1) for _, _, prices in twins], axis=1)
        with np.errstate(invalid="ignore"):
            change = np.maximum(np.abs(p[:, twinned] - pc), np.abs(e[twinned] - ec))
        at = rows[twinned]
        disc[:, at] = share[at] * np.where(np.isnan(change), np.inf, change)  # unknown: no tolerance met
    for oa, ol, idx, a, lim, u, _ in groups:
        pa[idx] = u.survival(a)
        exhaust_at = np.where(np.isfinite(lim), a + lim, a + ol)
        pe[idx] = np.where(np.isfinite(exhaust_at), u.survival_left(exhaust_at), 0.0)
        err[:, idx] = share[idx] * _beyond(model, u, oa, ol, a, lim, gs)
        note = _mean_note(u.diagnostics)
        for i in idx:
            mean_note[i] = note
    limit = np.array([x.limit for x in lays])
    collateral = share * np.array([x.max_annual_loss for x in lays])
    described = [x.describe() for x in lays]
    attachment = [x.attachment for x in lays]
    notes = _warnings(prem, err, disc, mean_note)
    flagged = sum(1 for block in notes for w in block if w)
    if flagged:
        first = next(w for block in notes for w in block if w)
        warnings.warn(GridWarning(f"{flagged} priced row(s) outside the grid tolerances, e.g. {first}"), stacklevel=2)
    if names is None:
        return _frame({}, described, attachment, limit, share, collateral, el, prem[0], sd, pa, pe, err[0], disc[0], notes[0])
    # one table for all distortions, block after block (building it once costs far less than concatenating)
    lead = {"distortion": [name for name in names for _ in range(k)]}
    def tile(x):  # np.tile for 1-d x, without its overhead
        return np.concatenate([x] * d)

    return _frame(lead, described * d, attachment * d, tile(limit), tile(share), tile(collateral), tile(el), prem.ravel(),
                  tile(sd), tile(pa), tile(pe), err.ravel(), disc.ravel(), [w for block in notes for w in block])


def _check_finite_mean(model: LossModel, lays: list[Layer]):
    """An unlimited layer on a model with an infinite mean has an infinite expected loss: refused."""
    if not model.infinite_mean:
        return
    for i, lay in enumerate(lays):
        if not math.isfinite(lay.occ_limit) and not math.isfinite(lay.agg_limit):
            where = f"layer {i + 1} ({lay.describe()})" if len(lays) > 1 else f"the layer {lay.describe()}"
            sev = getattr(model, "severity", None)
            why = f"{sev!r} has an infinite mean" if sev is not None else "the model has an infinite mean"
            raise InputError(
                "limit",
                f"{where} is unlimited but {why}, so its expected loss is infinite; give a finite limit "
                "(per occurrence or in the aggregate)",
            )


def _beyond(model, u, oa, ol, a, lim, gs) -> np.ndarray:
    """grid_error of each layer before share, one row per distortion in ``gs``: beyond_bound under it (at
    least the undistorted one), with unlimited layers' estimate from the model."""
    plain = _beyond_one(model, u, oa, ol, a, lim, None)
    if not plain.any():  # no layer reaches the top (the usual case): no distortion changes that
        return np.zeros((len(gs),) + plain.shape)
    return np.array([np.maximum(_beyond_one(model, u, oa, ol, a, lim, g), plain) for g in gs])


def _beyond_one(model, u, oa, ol, a, lim, g) -> np.ndarray:
    out = np.asarray(u.beyond_bound(a, lim, g), dtype=float)
    if u.beyond > 0:
        out = out.copy()
        for j in np.flatnonzero(~np.isfinite(lim)):
            out[j] = model.beyond_tail(u, oa, ol, float(a[j]), g)
    return out


def _mean_note(diag) -> str:
    """A warning when the grid's severity mean strays from the exact one (up to the grid top)."""
    peek = getattr(diag, "peek", diag.get)  # never forces a grid model's lazy diagnostics
    grid, exact = peek("severity_mean_grid"), peek("severity_mean_to_top")
    if grid is None:
        return ""
    if exact is None or not (math.isfinite(exact) and exact > 0):
        return ""
    rel = abs(grid / exact - 1.0)
    if rel <= MEAN_TOLERANCE:
        return ""
    return (f"the grid's severity mean {grid:.6g} differs from the exact {exact:.6g} by {rel:.2g} "
            f"(tolerance {MEAN_TOLERANCE:g}): give the model a smaller bucket")


def _warnings(prem, err, disc, mean_note) -> list[list[str]]:
    """The warning of each row, one list per distortion (the rows of ``prem``, ``err``, ``disc``, shape (d, k))."""
    with np.errstate(invalid="ignore"):
        scale = np.where(np.isfinite(prem), np.abs(prem), 0.0)
        beyond_over = err > BEYOND_TOLERANCE * scale
        disc_over = disc > DISCRETISATION_TOLERANCE * scale
    if not (beyond_over.any() or disc_over.any() or any(mean_note)):  # the usual case: nothing to say on any row
        return [[""] * len(mean_note) for _ in range(prem.shape[0])]
    return [_warning(*rows, mean_note) for rows in zip(prem, err, disc, beyond_over, disc_over)]


def _warning(prem, err, disc, beyond_over, disc_over, mean_note) -> list[str]:
    out = []
    for p, e, q, m, beyond_hit, disc_hit in zip(prem, err, disc, mean_note, beyond_over, disc_over):
        reasons = []
        if beyond_hit:
            if math.isinf(e):
                reasons.append("the layer reaches past the grid top and its price there may be infinite; "
                               "the premium shown is only the part below the top")
            else:
                reasons.append(f"probability beyond the grid top may change the premium by up to {e:.3g} "
                               f"({_rel(e, p)} of it; tolerance {BEYOND_TOLERANCE:g}): give the model a longer grid")
        if disc_hit:
            reasons.append(f"discretisation error estimate {q:.3g} ({_rel(q, p)} of the premium; tolerance "
                           f"{DISCRETISATION_TOLERANCE:g}): give the model a smaller bucket or a longer grid")
        if m:
            reasons.append(m)
        out.append("; ".join(reasons))
    return out


def _rel(x, p) -> str:
    return f"{x / p:.2g}" if p > 0 and math.isfinite(p) else "all"


def _frame(lead, described, attachment, limit, share, collateral, el, prem, sd, pa, pe, err, disc, notes) -> pd.DataFrame:
    """The priced table (columns as in ``COLUMNS``, after the ``lead`` columns)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        margin = prem - el
        capital = collateral - prem
        # a premium equal to the collateral up to the round-off of its sum (e.g. TVaR of a layer exhausted
        # more often than 1 - p) leaves no capital: not 1e-14 of it with a return of 1e14
        capital = np.where(np.isfinite(collateral) & (np.abs(capital) <= 1e-12 * np.abs(collateral)), 0.0, capital)
        numbers = {
            "attachment": attachment,
            "limit": limit,
            "share": share,
            "expected_loss": el,
            "premium": prem,
            "margin": margin,
            "loss_ratio": np.where(prem > 0, el / prem, np.nan),
            "rate_on_line": prem / share / limit,  # not / (share * limit): that product can underflow to 0
            "collateral": collateral,
            "capital": capital,
            # unbounded collateral (unlimited aggregate): no return can be stated, so NaN rather than a plausible 0
            "return_on_capital": np.where(np.isfinite(capital) & (capital > 0), margin / capital, np.nan),
            "leverage": np.where(np.isfinite(capital) & (capital > 0), prem / capital, np.nan),
            "std": sd,
            "cv": np.where(el > 0, sd / el, np.nan),
            "prob_attach": pa,
            "prob_exhaust": pe,
            "grid_error": err,
            "discretisation_error": disc,
        }
    texts = [_text(v) for v in lead.values()] + [_text(described)]
    if _from_blocks is None or _TEXT is None:
        return pd.DataFrame({**dict(zip(list(lead) + ["layer"], texts)), **numbers, "warning": _text(notes)})
    # the frame pandas' constructor builds from these columns (the numbers in one float block, each text
    # column its own), put together directly: the constructor's per-column checks cost more than the pricing
    lead_count = len(texts)
    block = np.array(list(numbers.values()), dtype=np.float64)
    blocks = [(t, np.array([i])) for i, t in enumerate(texts)]
    blocks.append((block, np.arange(lead_count, lead_count + block.shape[0])))
    blocks.append((_text(notes), np.array([lead_count + block.shape[0]])))
    return _from_blocks(blocks, index=pd.RangeIndex(block.shape[1]), columns=_columns(tuple(lead)))


@functools.lru_cache(maxsize=8)
def _columns(lead: tuple) -> pd.Index:
    """The priced table's column labels after the ``lead`` ones (an Index is immutable: frames share it)."""
    return pd.Index(list(lead) + COLUMNS)


def _text(values: list):
    """A text column: a copy of the one built last time for the same texts (a recalculated sheet asks
    for the same layer names and warnings again), so no frame shares an array another may edit."""
    return _text_array(tuple(values)).copy() if _TEXT is not None else values


@functools.lru_cache(maxsize=64)
def _text_array(values: tuple):
    return pd.array(list(values), dtype=_TEXT)


def price_layer(model: LossModel, layer: Layer, distortion: Distortion) -> pd.Series:
    """One layer's row of :func:`price_layers` as a Series."""
    return price_layers(model, [layer], distortion).iloc[0]


def layer_statistics(model: LossModel, layers, levels=(0.99, 0.996)) -> pd.DataFrame:
    """Expected loss, std, cv, VaR and TVaR at each level, per layer (after share)."""
    lays = _as_layers(layers)
    _check_finite_mean(model, lays)
    lv = np.atleast_1d(np.asarray(levels, dtype=float))
    if lv.size == 0 or np.any(~np.isfinite(lv)) or np.any((lv < 0) | (lv >= 1)):
        raise InputError("levels", "probability levels must lie in [0, 1)")
    rows = []
    for lay in lays:
        u = model.annual(lay.occ_attachment, lay.occ_limit)
        a, lim, s = lay.agg_attachment, lay.agg_limit, lay.share
        e = float(u.layer_integral(a, lim))
        row = {"layer": lay.describe(), "expected_loss": s * e,
               "std": s * math.sqrt(max(float(u.layer_second_moment(a, lim)) - e * e, 0.0))}
        row["cv"] = row["std"] / row["expected_loss"] if row["expected_loss"] > 0 else math.nan
        q = np.clip(u.quantile(lv) - a, 0.0, lim)
        for p, v in zip(lv, np.atleast_1d(q)):
            row[f"var_{p:g}"] = s * float(v)
            row[f"tvar_{p:g}"] = s * float(u.layer_integral(a, lim, TVaRDistortion(p)))
        rows.append(row)
    return pd.DataFrame(rows)
