"""Capital standards: the portfolio's assets, and its premium, capital and return on them.

A portfolio (a loss model, or directly a :class:`LossDistribution` of its
annual total X) can pay at most its assets ``a`` in a year. A
:class:`CapitalStandard` sets them:

* ``var``    a = VaR_p(X), the lower p-quantile of X (0 < p < 1);
* ``tvar``   a = TVaR_p(X) (0 <= p < 1);
* ``amount`` a given amount a > 0.

What the portfolio actually pays is X ∧ a, so at a distortion g (all amounts
in the model's currency, per year):

* expected_loss      E[X ∧ a]
* premium            rho_g(X ∧ a) = integral_0^a g(S(x)) dx
* margin             premium - expected_loss
* capital            a - premium (the assets that premium does not fund)
* return_on_capital  margin / capital;  leverage  premium / capital
* expected_default   E[(X - a)+], the loss left unpaid (the policyholders' deficit)

The layers of this capital structure are aggregate slices of X between 0 and
``a`` (:func:`capital_layers`); priced with the same g each slice's premium
is its integral of g(S), so the slices add up to the portfolio's premium
(comonotonic additivity), and their fully collateralised capitals
(width - premium) add up to the portfolio's capital.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from .distortions import Distortion, TVaRDistortion
from .distribution import LossDistribution
from .errors import InputError, as_array, as_float
from .layers import Layer
from .models import LossModel

__all__ = [
    "CapitalStandard",
    "make_capital_standard",
    "PortfolioPrice",
    "price_portfolio",
    "capital_layers",
    "portfolio_distribution",
]

KINDS = ("var", "tvar", "amount")
_ALIASES = {"var": "var", "value_at_risk": "var", "tvar": "tvar", "tail_value_at_risk": "tvar",
            "amount": "amount", "assets": "amount", "fixed": "amount"}


@dataclass(frozen=True)
class CapitalStandard:
    """How the portfolio's assets are set: ``kind`` is "var", "tvar" or "amount".

    ``value`` is the probability level p for "var" (0 < p < 1) and "tvar"
    (0 <= p < 1), or the assets themselves for "amount" (> 0, currency units).
    """

    kind: str
    value: float

    def __post_init__(self):
        if not isinstance(self.kind, str):
            raise InputError("kind", f"expected one of {', '.join(KINDS)}, got {self.kind!r}")
        key = _ALIASES.get(self.kind.strip().lower().replace(" ", "_").replace("-", "_"))
        if key is None:
            raise InputError("kind", f"capital standard must be one of {', '.join(KINDS)}, got {self.kind!r}")
        object.__setattr__(self, "kind", key)
        if key == "var":
            v = as_float(self.value, "level", low=0.0, high=1.0, low_open=True, high_open=True)
        elif key == "tvar":
            v = as_float(self.value, "level", low=0.0, high=1.0, high_open=True)
        else:
            v = as_float(self.value, "assets", low=0.0, low_open=True)
        object.__setattr__(self, "value", v)

    @classmethod
    def var(cls, p: float) -> "CapitalStandard":
        return cls("var", p)

    @classmethod
    def tvar(cls, p: float) -> "CapitalStandard":
        return cls("tvar", p)

    @classmethod
    def amount(cls, assets: float) -> "CapitalStandard":
        return cls("amount", assets)

    def assets(self, distribution: LossDistribution) -> float:
        """The assets this standard sets for a portfolio with annual total ``distribution``."""
        if self.kind == "var":
            a = float(distribution.quantile(self.value))
        elif self.kind == "tvar":
            a = float(distribution.price(TVaRDistortion(self.value)))
        else:
            a = self.value
        if not a > 0:
            raise InputError("level", f"{self.label()} of this portfolio is {a:.6g}; assets must be positive, "
                                      "choose a higher level or an amount")
        return a

    def label(self) -> str:
        if self.kind == "amount":
            return f"assets {self.value:,.6g}"
        return f"{'VaR' if self.kind == 'var' else 'TVaR'} {self.value:.6g}"


def make_capital_standard(kind: str, value: float) -> CapitalStandard:
    """Capital standard from a name ("var", "tvar", "amount") and its level or amount, as a cell gives them."""
    return CapitalStandard(kind, value)


def portfolio_distribution(portfolio) -> LossDistribution:
    """Annual total loss of ``portfolio``: a LossModel's ground-up ``annual()``, or a LossDistribution itself."""
    if isinstance(portfolio, LossDistribution):
        return portfolio
    if isinstance(portfolio, LossModel):
        return portfolio.annual()
    raise InputError("model", f"expected a loss model or a loss distribution, got {portfolio!r}")


def _check_standard(standard) -> CapitalStandard:
    if not isinstance(standard, CapitalStandard):
        raise InputError("standard", f"expected a CapitalStandard (e.g. CapitalStandard.var(0.99)), got {standard!r}")
    return standard


def _check_distortion(distortion) -> Distortion:
    if not isinstance(distortion, Distortion):
        raise InputError("distortion", f"expected a distortion, got {distortion!r}")
    return distortion


@dataclass(frozen=True)
class PortfolioPrice:
    """The portfolio's economics at one capital standard and distortion (see module docstring)."""

    standard: str
    distortion: str
    assets: float
    expected_loss: float
    premium: float
    margin: float
    capital: float
    return_on_capital: float
    leverage: float
    loss_ratio: float
    expected_default: float
    grid_error: float

    def as_series(self) -> pd.Series:
        return pd.Series(asdict(self))


def _economics(el: float, premium: float, assets: float):
    """margin, capital, return on capital, leverage, loss ratio (NaN where undefined)."""
    margin = premium - el
    capital = assets - premium
    roc = margin / capital if capital > 0 else math.nan
    lev = premium / capital if capital > 0 else math.nan
    lr = el / premium if premium > 0 else math.nan
    return margin, capital, roc, lev, lr


def price_portfolio(model, distortion: Distortion, standard: CapitalStandard) -> PortfolioPrice:
    """Premium rho_g(X ∧ a), capital a - premium and return on capital of the whole portfolio.

    ``model`` is a LossModel (its ground-up annual total is used) or a
    LossDistribution; ``standard`` sets the assets a.
    """
    dist = portfolio_distribution(model)
    g = _check_distortion(distortion)
    std = _check_standard(standard)
    a = std.assets(dist)
    el = float(dist.layer_integral(0.0, a))
    prem = float(dist.layer_integral(0.0, a, g))
    margin, capital, roc, lev, lr = _economics(el, prem, a)
    err = float(max(dist.beyond_bound(0.0, a, g), dist.beyond_bound(0.0, a)))
    default = float(dist.tail_integral(a))
    return PortfolioPrice(std.label(), g.label(), a, el, prem, margin, capital, roc, lev, lr, default, err)


def capital_layers(assets: float, breaks=()) -> list[Layer]:
    """Aggregate slices 0-b1, b1-b2, ..., bk-assets of the annual total: the capital structure's layers.

    ``breaks`` are the interior slice boundaries, strictly increasing inside
    (0, assets); with none, the single slice 0-assets.
    """
    a = as_float(assets, "assets", low=0.0, low_open=True)
    b = as_array(breaks, "breaks", low=0.0, allow_empty=True)
    if b.size and (b[0] <= 0 or b[-1] >= a or np.any(np.diff(b) <= 0)):
        raise InputError("breaks", f"must increase strictly inside (0, {a:.6g}), got {b.tolist()}")
    edges = np.concatenate([[0.0], b, [a]])
    return [Layer.aggregate(lo, hi - lo) for lo, hi in zip(edges[:-1], edges[1:])]
