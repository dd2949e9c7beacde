"""Per-occurrence layers with paid reinstatements, priced with a distortion.

Layer ``l xs a`` per occurrence with n reinstatements: the year's payments
are L = min(sum_i min(max(X_i - a, 0), l), (1 + n) l). The k-th reinstatement
(k = 1..n) restores the limit used in band k, B_k(L) = min(max(L - (k-1) l, 0), l),
and costs c_k * P * B_k(L) / l, where P is the upfront premium and c_k the
reinstatement rate (1.0 = 100%). Reinstatement premium is pro rata to the
amount reinstated only (not to the time left in the year). So the reinsurer's
net loss is

    N(L) = L - P h(L),    h(L) = sum_k c_k B_k(L) / l,

and the premium is fair at distortion g when rho_g(N(L)) = P.

When N is nondecreasing in L, L = N(L) + P h(L) splits L into two
comonotonic parts, so rho_g(L) = rho_g(N) + P rho_g(h(L)) and

    P = rho_g(L) / (1 + rho_g(h(L))).

h has slope c_k / l on band k and 0 above n l, so N is nondecreasing exactly
when P max_k c_k <= l. This always holds for rates up to 100% (then
rho_g(L) <= rho_g(min(L, n l)) + l gives P <= l); it can fail for rates above
100%. Then N falls on some band, the split is not comonotonic, and P is found
as the root of rho_g(N_P(L)) - P = 0 on [0, rho_g(L)] (a strictly decreasing
function of P, since N_P falls pointwise as P rises), pricing the exact
distribution of N_P on the atoms of L. ``method`` says which route was used.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import optimize

from .distortions import Distortion
from .distribution import LossDistribution
from .errors import InputError, as_array, as_float
from .models import LossModel

__all__ = ["ReinstatementPrice", "price_with_reinstatements", "reinstatement_factor"]

MAX_REINSTATEMENTS = 1000  # upper bound on work and a sanity limit on the contract
MAX_RATE = 10.0  # 1000% of the upfront premium per reinstatement


@dataclass(frozen=True)
class ReinstatementPrice:
    """Upfront and reinstatement premiums of a layer with paid reinstatements (after share)."""

    upfront_premium: float
    expected_reinstatement_premium: float
    total_expected_premium: float
    expected_loss: float
    loss_ratio: float              # expected loss / total expected premium
    upfront_loss_ratio: float      # expected loss / upfront premium
    rate_on_line: float            # upfront premium / (share * limit)
    premium_no_reinstatement_cost: float  # rho_g(L): the same layer with free reinstatements
    reinstatements: int
    monotone: bool                 # True when N(L) = L - P h(L) is nondecreasing (P max c <= l)
    method: str                    # "comonotonic" (closed form) or "net loss root"

    def as_series(self) -> pd.Series:
        return pd.Series(asdict(self))


def reinstatement_factor(losses, limit: float, rates) -> np.ndarray:
    """h(L) = sum_k c_k min(max(L - (k-1) l, 0), l) / l, vectorised over ``losses``: shape of losses."""
    x = np.asarray(losses, dtype=float)
    c = np.asarray(rates, dtype=float).reshape(-1)
    if c.size == 0:
        return np.zeros_like(x)
    k = np.arange(c.size, dtype=float)
    bands = np.clip(x[..., None] - k * limit, 0.0, limit)  # (..., n)
    return bands @ c / limit


def _rho(values: np.ndarray, probs: np.ndarray, g) -> float:
    """rho_g of a discrete variable taking ``values`` (any sign, any order) with ``probs``."""
    shift = min(float(values.min()), 0.0)  # translation invariance: rho(Y) = rho(Y - m) + m
    d = LossDistribution.from_atoms(values - shift, probs)
    return d.price(g) + shift


def price_with_reinstatements(model: LossModel, attachment: float, limit: float, rates, distortion: Distortion,
                              *, share: float = 1.0) -> ReinstatementPrice:
    """Upfront premium P with rho_g(L - P h(L)) = P for ``limit`` xs ``attachment`` with len(rates) paid reinstatements.

    ``rates`` are c_1..c_n, the reinstatement premium rates as fractions of the
    upfront premium (0 for a free reinstatement); an empty list means no
    reinstatement. Amounts are for the ``share`` taken (all premiums scale with it).
    """
    if not isinstance(model, LossModel):
        raise InputError("model", f"expected a loss model, got {model!r}")
    if not isinstance(distortion, Distortion):
        raise InputError("distortion", f"expected a distortion, got {distortion!r}")
    a = as_float(attachment, "attachment", low=0.0)
    lim = as_float(limit, "limit", low=0.0, low_open=True)
    s = as_float(share, "share", low=0.0, high=1.0, low_open=True)
    c = as_array(rates, "rates", low=0.0, allow_empty=True)
    if c.size > MAX_REINSTATEMENTS:
        raise InputError("rates", f"at most {MAX_REINSTATEMENTS} reinstatements, got {c.size}")
    if c.size and c.max() > MAX_RATE:
        raise InputError("rates", f"each rate must lie in [0, {MAX_RATE:g}] (fractions of the upfront premium), "
                                  f"largest is {c.max():.6g}")
    n = int(c.size)
    g = distortion
    u = model.annual(a, lim)
    L = u.layer(0.0, (1.0 + n) * lim)  # the layer's annual loss at 100%
    x, p = L.values, L.probs
    s_gt = L.sf
    s_ge = np.concatenate([[1.0], L.sf[:-1]])
    q = np.asarray(g(s_ge), dtype=float) - np.asarray(g(s_gt), dtype=float)  # distorted atom weights
    hx = reinstatement_factor(x, lim, c)
    rho_l = float(L.price(g))
    rho_h = float(q @ hx)  # h is nondecreasing in L, so rho_g(h(L)) weights its values by q
    prem = rho_l / (1.0 + rho_h)
    monotone = bool(c.size == 0 or prem * c.max() <= lim)
    method = "comonotonic"
    if not monotone:
        def excess(P):
            return _rho(x - P * hx, p, g) - P

        prem = float(optimize.brentq(excess, 0.0, rho_l, xtol=1e-14 * max(rho_l, 1e-300), rtol=4 * np.finfo(float).eps,
                                     maxiter=500)) if rho_l > 0 else 0.0
        method = "net loss root"
        monotone = bool(prem * c.max() <= lim)
    eh = float(p @ hx)
    el = float(L.mean())
    up = s * prem
    rein = up * eh
    tot = up + rein
    return ReinstatementPrice(
        upfront_premium=up,
        expected_reinstatement_premium=rein,
        total_expected_premium=tot,
        expected_loss=s * el,
        loss_ratio=s * el / tot if tot > 0 else math.nan,
        upfront_loss_ratio=s * el / up if up > 0 else math.nan,
        rate_on_line=prem / lim,  # = up / (s * lim), without the product that can underflow to 0
        premium_no_reinstatement_cost=s * rho_l,
        reinstatements=n,
        monotone=monotone,
        method=method,
    )
