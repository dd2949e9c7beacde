"""Calibrating distortion families: to a target return on capital, or to an observed market price.

Both problems reduce to one: find the parameter theta of a one-parameter family
for which a premium, rho_{g_theta}(L), equals a target premium P*. The premium
is continuous and monotone in theta (``loads_up`` says which way), equal to
E[L] at the family's neutral end (PH r = 1, Wang lam = 0, dual power m = 1,
TVaR p = 0, cost of capital 0) and largest at the far end of its ``bounds``;
so P* is reachable exactly when E[L] <= P* <= that largest premium, and
``scipy.optimize.brentq`` finds theta on the bracket between the two ends.

* Target return t at a capital standard (assets a): the portfolio premium must
  satisfy (P - E[X ∧ a]) / (a - P) = t, i.e. P* = (E[X ∧ a] + t a) / (1 + t).
* Market price of one layer: P* is the observed premium (or rate on line times
  share times limit).

A family that cannot reach the target raises :class:`InputError` naming the
argument (``target_return``, ``premium`` or ``rate_on_line``) and the range the
family can reach.
"""
from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import optimize

from .capital import CapitalStandard, _check_standard, _economics, capital_layers, portfolio_distribution
from .distortions import FAMILIES, Distortion
from .errors import InputError, as_float
from .layers import Layer
from .models import LossModel
from .pricing import _as_layers, price_layers

__all__ = [
    "DEFAULT_FAMILIES",
    "CalibrationResult",
    "calibrate_to_return",
    "calibrate",
    "price_at_target",
    "ImpliedResult",
    "implied_parameter",
    "implied_parameters",
    "implied_spread",
]

DEFAULT_FAMILIES = ("proportional_hazard", "wang", "dual_power", "tvar", "cost_of_capital")
OPEN_END_GAP = 1e-12  # an open bound is approached to this fraction of the family's range
PREMIUM_RTOL = 1e-13  # a target within this relative distance of an end's premium is taken as that end
_XTOL = 1e-14  # brentq tolerances: parameters to about 1e-14, far inside the 1e-8 round trip promised


# --------------------------------------------------------------------------- family search
def _family(family, argument: str = "family") -> type[Distortion]:
    """A one-parameter distortion class from a family name or the class itself."""
    if isinstance(family, type) and issubclass(family, Distortion) and family.parameter is not None:
        return family
    if isinstance(family, str):
        key = family.strip().lower().replace(" ", "_").replace("-", "_")
        cls = FAMILIES.get(key)
        if cls is not None:
            return cls
    names = ", ".join(sorted({c.family for c in FAMILIES.values()}))
    raise InputError(argument, f"unknown distortion family {family!r}; choose among {names}")


def _families(families) -> list[type[Distortion]]:
    if families is None:
        families = DEFAULT_FAMILIES
    if isinstance(families, (str, type)):
        families = [families]
    if not isinstance(families, Iterable):
        raise InputError("families", f"expected family names, got {families!r}")
    out = [_family(f, "families") for f in families]
    if not out:
        raise InputError("families", "no families given")
    return out


def _endpoint(cls: type[Distortion], x: float, inward: float) -> float:
    """``x`` if the family accepts it, else nudged inward (for open bounds such as PH r > 0, TVaR p < 1)."""
    try:
        cls(x)
        return x
    except InputError:
        lo, hi = cls.bounds
        return x + inward * OPEN_END_GAP * (hi - lo)


def family_ends(cls: type[Distortion]) -> tuple[float, float]:
    """(neutral, loading) parameter values: the ends of the family's range, neutral pricing at E[L]."""
    lo, hi = cls.bounds
    lo = _endpoint(cls, lo, +1.0)
    hi = _endpoint(cls, hi, -1.0)
    return (lo, hi) if cls.loads_up else (hi, lo)


class _Unreachable(Exception):
    """Target premium outside [low, high], the premiums at the family's two ends."""

    def __init__(self, low, high):
        super().__init__(low, high)
        self.low, self.high = low, high


def _solve(price, cls: type[Distortion], target: float) -> float:
    """Parameter theta with price(cls(theta)) = target; raises _Unreachable with the reachable premiums."""
    neutral, loading = family_ends(cls)
    p0, p1 = price(cls(neutral)), price(cls(loading))
    if not math.isfinite(target):
        raise _Unreachable(p0, p1)
    tol = PREMIUM_RTOL * max(abs(p0), abs(p1), abs(target), 1e-300)
    if not (p0 - tol <= target <= p1 + tol):
        raise _Unreachable(p0, p1)
    if abs(target - p0) <= tol:
        return neutral
    if abs(target - p1) <= tol:
        return loading
    lo, hi = sorted((neutral, loading))
    return float(optimize.brentq(lambda t: price(cls(t)) - target, lo, hi, xtol=_XTOL, rtol=4 * np.finfo(float).eps, maxiter=500))


# --------------------------------------------------------------------------- target return
def _as_series(result) -> pd.Series:
    """A result as a Series, its distortion shown by label."""
    d = asdict(result)
    d["distortion"] = result.distortion.label()
    return pd.Series(d)


@dataclass(frozen=True)
class CalibrationResult:
    """A family's parameter calibrated so the portfolio earns ``return_on_capital`` at ``standard``."""

    family: str
    parameter: str
    value: float
    distortion: Distortion
    standard: str
    assets: float
    expected_loss: float
    premium: float
    margin: float
    capital: float
    return_on_capital: float
    leverage: float

    as_series = _as_series


def calibrate_to_return(model, target_return: float, standard: CapitalStandard, family) -> CalibrationResult:
    """Parameter of ``family`` making the portfolio's return on capital equal ``target_return``.

    ``model`` is a LossModel (ground-up annual total) or LossDistribution;
    ``standard`` sets the assets a. Returns are margin / (a - premium).
    """
    dist = portfolio_distribution(model)
    std = _check_standard(standard)
    cls = _family(family)
    t = as_float(target_return, "target_return")
    a = std.assets(dist)
    el = float(dist.layer_integral(0.0, a))

    def price(g):
        return float(dist.layer_integral(0.0, a, g))

    # margin = t * capital  <=>  P - EL = t (a - P)
    target = (el + t * a) / (1.0 + t) if t > -1.0 else -math.inf
    try:
        theta = _solve(price, cls, target)
    except _Unreachable as u:
        top = _economics(el, u.high, a)[2]
        top = math.inf if not math.isfinite(top) and a - u.high <= PREMIUM_RTOL * a else top
        raise InputError(
            "target_return",
            f"the {cls.family} family reaches returns on capital from 0 to {top:.6g} at {std.label()} "
            f"(assets {a:,.6g}); got {t:.6g}",
        ) from None
    g = cls(theta)
    prem = price(g)
    margin, capital, roc, lev, _ = _economics(el, prem, a)
    return CalibrationResult(cls.family, cls.parameter, theta, g, std.label(), a, el, prem, margin, capital, roc, lev)


def _each_family(fn, families, errors):
    if errors not in ("raise", "skip"):
        raise InputError("errors", f"must be 'raise' or 'skip', got {errors!r}")
    rows = []
    for cls in _families(families):
        try:
            rows.append((cls, fn(cls), ""))
        except InputError as e:
            if errors == "raise":
                raise
            rows.append((cls, None, str(e)))
    return rows


def _family_table(fn, families, errors, columns) -> pd.DataFrame:
    """One row per family from ``fn(family class)`` (a result with ``as_series``); a family that
    failed (``errors="skip"``) gets NaNs and its reason in ``note``."""
    out = []
    for cls, res, note in _each_family(fn, families, errors):
        if res is None:
            out.append({"family": cls.family, "parameter": cls.parameter, "note": note})
        else:
            row = res.as_series().to_dict()
            row.pop("distortion")
            row["note"] = ""
            out.append(row)
    return pd.DataFrame(out).reindex(columns=columns)


_CAL_COLUMNS = ["family", "parameter", "value", "standard", "assets", "expected_loss", "premium", "margin",
                "capital", "return_on_capital", "leverage", "note"]


def calibrate(model, target_return: float, standard: CapitalStandard, families=None, *, errors: str = "raise") -> pd.DataFrame:
    """One row per family: the parameter earning ``target_return`` at ``standard`` and the portfolio's figures.

    ``families`` defaults to :data:`DEFAULT_FAMILIES`. With ``errors="skip"`` a
    family that cannot reach the target gets NaNs and its reason in ``note``.
    """
    return _family_table(lambda c: calibrate_to_return(model, target_return, standard, c), families, errors, _CAL_COLUMNS)


def price_at_target(model: LossModel, layers, target_return: float, standard: CapitalStandard, families=None, *,
                    breaks=None) -> pd.DataFrame:
    """Price a tower with each family calibrated so the whole portfolio earns ``target_return``.

    ``layers`` may be any layers of ``model`` (see :func:`price_layers`); with
    ``layers=None`` the capital structure's slices :func:`capital_layers`
    (0-b1-...-assets, ``breaks`` interior) are used. Rows are
    :func:`price_layers` rows with leading ``distortion`` (family name) and
    ``parameter``/``value`` columns, and ``part_above_assets``: the fraction
    of an aggregate layer's width above the assets (NaN for per-occurrence
    layers, which are not slices of the annual total).

    Layers above the assets lie outside the capital structure: the portfolio
    cannot pay those losses, so they earn no part of the target. They are
    still priced with the calibrated distortion (that price is the value of
    the policyholders' default on that slice, or what buying that cover at the
    portfolio's own pricing would cost); only slices within 0-assets add up to
    the calibrated premium, capital and target return.
    """
    if not isinstance(model, LossModel):
        raise InputError("model", f"expected a loss model, got {model!r}")
    cals = [res for _, res, _ in _each_family(lambda c: calibrate_to_return(model, target_return, standard, c), families, "raise")]
    if layers is None:
        lays = capital_layers(cals[0].assets, () if breaks is None else breaks)
    else:
        lays = _as_layers(layers)
    frames = []
    for res in cals:
        df = price_layers(model, lays, res.distortion)
        df.insert(0, "value", res.value)
        df.insert(0, "parameter", res.parameter)
        df.insert(0, "distortion", res.family)
        frames.append(df)
    out = pd.concat(frames, ignore_index=True)
    a = cals[0].assets
    above = []
    for lay in lays:
        if lay.has_occurrence_terms:
            above.append(math.nan)
        else:
            lo, hi = lay.agg_attachment, lay.agg_attachment + lay.agg_limit
            # an unlimited layer has infinite width above any finite assets: all of it, in measure
            above.append(min(max(hi - max(lo, a), 0.0) / (hi - lo), 1.0) if math.isfinite(hi) else 1.0)
    out["part_above_assets"] = np.tile(above, len(cals))
    return out


# --------------------------------------------------------------------------- implied from a market price
@dataclass(frozen=True)
class ImpliedResult:
    """A family's parameter reproducing an observed layer premium."""

    family: str
    parameter: str
    value: float
    distortion: Distortion
    premium: float
    expected_loss: float
    rate_on_line: float
    loss_ratio: float

    as_series = _as_series


def _layer_pricer(model: LossModel, layer: Layer):
    """premium(g) for one layer, computed exactly as price_layers does (so round trips agree to rounding)."""
    if not isinstance(model, LossModel):
        raise InputError("model", f"expected a loss model, got {model!r}")
    if not isinstance(layer, Layer):
        raise InputError("layer", f"expected a Layer, got {layer!r}")
    u = model.annual(layer.occ_attachment, layer.occ_limit)
    a, lim, s = layer.agg_attachment, layer.agg_limit, layer.share

    def price(g):
        return float(s * u.layer_integral(a, lim, g))

    ceiling = float(s * u.layer_integral(a, lim, lambda sf: (np.asarray(sf) > 0).astype(float)))
    return price, price(None), ceiling


def _observed(layer: Layer, premium, rate_on_line) -> tuple[float, str]:
    if (premium is None) == (rate_on_line is None):
        raise InputError("premium", "give exactly one of premium or rate_on_line")
    if premium is not None:
        return as_float(premium, "premium", low=0.0), "premium"
    rol = as_float(rate_on_line, "rate_on_line", low=0.0)
    if not math.isfinite(layer.limit):
        raise InputError("rate_on_line", "needs a layer with a finite limit; give the premium instead")
    return rol * layer.share * layer.limit, "rate_on_line"


def implied_parameter(model: LossModel, layer: Layer, family, *, premium=None, rate_on_line=None) -> ImpliedResult:
    """Parameter of ``family`` whose price of ``layer`` on ``model`` equals the observed premium.

    Give the observation as ``premium`` (currency, after share) or as
    ``rate_on_line`` (premium / (share * limit)).
    """
    price, el, ceiling = _layer_pricer(model, layer)
    cls = _family(family)
    target, arg = _observed(layer, premium, rate_on_line)
    scale = layer.share * layer.limit if math.isfinite(layer.limit) else 1.0

    def show(p):
        return f"rate on line {p / scale:.6g}" if arg == "rate_on_line" else f"premium {p:,.6g}"

    tol = PREMIUM_RTOL * max(el, target, 1e-300)
    if target < el - tol:
        raise InputError(arg, f"the observed {show(target)} is below the layer's expected loss ({show(el)}); "
                              "no distortion prices a layer below its expected loss")
    if target > ceiling + tol:
        raise InputError(arg, f"the observed {show(target)} is above the most the layer can pay in a year "
                              f"({show(ceiling)}: its limit times share, capped at the largest modelled loss)")
    try:
        theta = _solve(price, cls, target)
    except _Unreachable as u:
        raise InputError(arg, f"the {cls.family} family reaches prices from {show(u.low)} to {show(u.high)} "
                              f"for this layer; got {show(target)}") from None
    g = cls(theta)
    p = price(g)
    rol = p / scale if math.isfinite(layer.limit) else math.nan
    return ImpliedResult(cls.family, cls.parameter, theta, g, p, el, rol, el / p if p > 0 else math.nan)


_IMP_COLUMNS = ["family", "parameter", "value", "premium", "expected_loss", "rate_on_line", "loss_ratio", "note"]


def implied_parameters(model: LossModel, layer: Layer, *, premium=None, rate_on_line=None, families=None,
                       errors: str = "raise") -> pd.DataFrame:
    """One row per family: the parameter reproducing the observed price of ``layer``."""
    fn = lambda c: implied_parameter(model, layer, c, premium=premium, rate_on_line=rate_on_line)  # noqa: E731
    return _family_table(fn, families, errors, _IMP_COLUMNS)


_MEASURES = ("premium", "rate_on_line", "loss_ratio", "margin", "return_on_capital")


def implied_spread(model: LossModel, layers, market_layer, *, premium=None, rate_on_line=None, families=None,
                   measure: str = "premium") -> pd.DataFrame:
    """Layer x family table: every layer priced with each family implied from one layer's market price.

    ``market_layer`` is the index of the calibrating layer in ``layers``, or a
    Layer (which need not be in the tower). One row per layer of ``layers``
    with ``layer``, ``attachment``, ``limit``, ``expected_loss``, a column per
    family holding ``measure`` (one of premium, rate_on_line, loss_ratio,
    margin, return_on_capital), then ``low``, ``high``, ``spread`` (high - low)
    and ``relative_spread`` (spread / mean over families), and ``calibrating``
    (True on the calibrating layer, where every family agrees). The implied
    parameters are in ``frame.attrs["parameters"]`` (family -> value).
    """
    lays = _as_layers(layers)
    if isinstance(market_layer, Layer):
        calib = market_layer
    else:
        i = as_float(market_layer, "market_layer", low=0, high=len(lays) - 1)
        if i != int(i):
            raise InputError("market_layer", f"must be a whole layer index 0..{len(lays) - 1}, got {i:g}")
        calib = lays[int(i)]
    if measure not in _MEASURES:
        raise InputError("measure", f"must be one of {', '.join(_MEASURES)}, got {measure!r}")
    fams = _families(families)
    implied = [implied_parameter(model, calib, c, premium=premium, rate_on_line=rate_on_line) for c in fams]
    out = None
    for res in implied:
        df = price_layers(model, lays, res.distortion)
        if out is None:
            out = df[["layer", "attachment", "limit", "expected_loss"]].copy()
        out[res.family] = df[measure].to_numpy()
    vals = out[[r.family for r in implied]].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out["low"] = vals.min(axis=1)
        out["high"] = vals.max(axis=1)
        out["spread"] = out["high"] - out["low"]
        mean = vals.mean(axis=1)
        out["relative_spread"] = np.where(mean != 0, out["spread"] / np.abs(mean), np.nan)
    out["calibrating"] = [lay == calib for lay in lays]
    out.attrs["parameters"] = {r.family: r.value for r in implied}
    out.attrs["measure"] = measure
    return out
