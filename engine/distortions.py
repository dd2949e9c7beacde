"""Distortion functions g: [0, 1] -> [0, 1] for spectral (distortion) prices.

Each distortion is a small immutable object that is called on survival
probabilities: ``g(s)`` accepts a scalar or an array of any shape and returns
float64 of the same shape. Every family is checked on construction: g(0)=0,
g(1)=1, increasing, and concave (so that prices are coherent and never below
the expected loss).

One-parameter families carry the class attributes ``parameter`` (its name),
``bounds`` (valid range) and ``loads_up`` (True when a larger parameter gives
a larger price); calibration uses them to search along the family.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from scipy import special

from .errors import InputError, as_array, as_float

__all__ = [
    "Distortion",
    "ProportionalHazard",
    "WangTransform",
    "DualPower",
    "TVaRDistortion",
    "CostOfCapital",
    "Blend",
    "TableDistortion",
    "FAMILIES",
    "make_distortion",
]


def _unit(s) -> np.ndarray:
    """Survival probabilities as float64, with float round-off clipped into [0, 1]."""
    s = np.asarray(s, dtype=np.float64)
    return np.minimum(np.maximum(s, 0.0), 1.0)  # as np.clip (NaN stays NaN), without its Python overhead


class Distortion:
    """Base class: subclasses implement ``_g`` on an array already in [0, 1]."""

    family: ClassVar[str] = ""
    parameter: ClassVar[str | None] = None
    bounds: ClassVar[tuple[float, float]] = (0.0, 0.0)
    loads_up: ClassVar[bool] = True

    def __call__(self, s):
        s = _unit(s)
        if s.ndim:
            low, high = s <= 0.0, s >= 1.0
        out = np.asarray(self._g(s), dtype=np.float64)
        # Pin the end points exactly: prices of certain amounts must be exact.
        if s.ndim and out.shape == s.shape and out.flags.writeable and (out is s or out.flags.owndata):
            out[low] = 0.0  # in place on the fresh result: several times faster than np.where on large arrays
            out[high] = 1.0
            return out
        out = np.where(s <= 0.0, 0.0, np.where(s >= 1.0, 1.0, out))
        return out if out.ndim else float(out)

    def _g(self, s: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def inside(self, s: np.ndarray) -> np.ndarray:
        """g on float64 survival probabilities all strictly inside (0, 1): what ``self(s)`` returns there
        (nothing to clip or pin), without the checks; for the integral passes."""
        return np.asarray(self._g(s), dtype=np.float64)

    @property
    def value(self) -> float:
        """The family parameter's value (one-parameter families only)."""
        if self.parameter is None:
            raise InputError("distortion", f"{self.family} has no single parameter")
        return float(getattr(self, self.parameter))

    def with_value(self, value: float) -> "Distortion":
        """The same family with its parameter set to ``value``."""
        if self.parameter is None:
            raise InputError("distortion", f"{self.family} has no single parameter")
        return type(self)(value)

    @property
    def concave(self) -> bool:
        return True

    def label(self) -> str:
        if self.parameter is None:
            return self.family
        return f"{self.family}({self.parameter}={self.value:.6g})"


@dataclass(frozen=True)
class ProportionalHazard(Distortion):
    """g(s) = s**r, 0 < r <= 1 (Wang 1995). Smaller r loads more; r = 1 is the mean."""

    r: float
    family: ClassVar[str] = "proportional_hazard"
    parameter: ClassVar[str] = "r"
    bounds: ClassVar[tuple[float, float]] = (0.0, 1.0)
    loads_up: ClassVar[bool] = False

    def __post_init__(self):
        object.__setattr__(self, "r", as_float(self.r, "r", low=0.0, high=1.0, low_open=True))

    def _g(self, s):
        return s**self.r


@dataclass(frozen=True)
class WangTransform(Distortion):
    """g(s) = Phi(Phi^-1(s) + lam), lam >= 0 (Wang 2000)."""

    lam: float
    family: ClassVar[str] = "wang"
    parameter: ClassVar[str] = "lam"
    bounds: ClassVar[tuple[float, float]] = (0.0, 20.0)

    def __post_init__(self):
        object.__setattr__(self, "lam", as_float(self.lam, "lam", low=0.0, high=20.0))

    def _g(self, s):
        with np.errstate(divide="ignore", invalid="ignore"):
            return special.ndtr(special.ndtri(s) + self.lam)


@dataclass(frozen=True)
class DualPower(Distortion):
    """g(s) = 1 - (1 - s)**m, m >= 1. For integer m the price is E[max of m copies]."""

    m: float
    family: ClassVar[str] = "dual_power"
    parameter: ClassVar[str] = "m"
    bounds: ClassVar[tuple[float, float]] = (1.0, 1e6)

    def __post_init__(self):
        object.__setattr__(self, "m", as_float(self.m, "m", low=1.0, high=1e6))

    def _g(self, s):
        with np.errstate(divide="ignore"):
            return -np.expm1(self.m * np.log1p(-s))


@dataclass(frozen=True)
class TVaRDistortion(Distortion):
    """g(s) = min(s / (1 - p), 1), 0 <= p < 1: the price is TVaR at level p; p = 0 is the mean."""

    p: float
    family: ClassVar[str] = "tvar"
    parameter: ClassVar[str] = "p"
    bounds: ClassVar[tuple[float, float]] = (0.0, 1.0)

    def __post_init__(self):
        object.__setattr__(self, "p", as_float(self.p, "p", low=0.0, high=1.0, high_open=True))

    def _g(self, s):
        return np.minimum(s / (1.0 - self.p), 1.0)


@dataclass(frozen=True)
class CostOfCapital(Distortion):
    """Constant cost of capital at return ``roe``: g(s) = (s + roe) / (1 + roe) for s > 0, g(0) = 0.

    The jump at 0 charges ``roe`` on all capital up to the top of the support,
    so every layer priced with it returns exactly ``roe`` on its capital.
    """

    roe: float
    family: ClassVar[str] = "cost_of_capital"
    parameter: ClassVar[str] = "roe"
    bounds: ClassVar[tuple[float, float]] = (0.0, 100.0)

    def __post_init__(self):
        object.__setattr__(self, "roe", as_float(self.roe, "roe", low=0.0, high=100.0))

    def _g(self, s):
        return (s + self.roe) / (1.0 + self.roe)


@dataclass(frozen=True)
class Blend(Distortion):
    """Convex blend sum_i w_i g_i(s) of distortions; weights >= 0 summing to 1."""

    components: tuple
    weights: tuple
    family: ClassVar[str] = "blend"

    def __post_init__(self):
        comps = tuple(self.components)
        if not comps:
            raise InputError("components", "a blend needs at least one distortion")
        for c in comps:
            if not isinstance(c, Distortion):
                raise InputError("components", f"expected distortions, got {c!r}")
        w = as_array(self.weights, "weights", low=0.0)
        if w.size != len(comps):
            raise InputError("weights", f"needs one weight per component ({len(comps)}), got {w.size}")
        if abs(w.sum() - 1.0) > 1e-9:
            raise InputError("weights", f"must sum to 1, they sum to {w.sum():.12g}")
        object.__setattr__(self, "components", comps)
        object.__setattr__(self, "weights", tuple(float(x) for x in w / w.sum()))

    def _g(self, s):
        return sum(w * c(s) for w, c in zip(self.weights, self.components))

    @property
    def concave(self) -> bool:
        return all(c.concave for c in self.components)

    def label(self) -> str:
        parts = ", ".join(f"{w:.4g}*{c.label()}" for w, c in zip(self.weights, self.components))
        return f"blend({parts})"


@dataclass(frozen=True)
class TableDistortion(Distortion):
    """Piecewise-linear g through user points (s_i, g_i); must include s=0 and s=1.

    Points must have g(0)=0, g(1)=1 and g non-decreasing. Concavity is required
    unless ``require_concave=False`` (a non-concave g can price below the mean).
    """

    s: tuple
    g: tuple
    require_concave: bool = True
    family: ClassVar[str] = "table"
    _xs: np.ndarray = field(init=False, repr=False, compare=False)
    _ys: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        xs = as_array(self.s, "s")
        ys = as_array(self.g, "g")
        if xs.size != ys.size:
            raise InputError("g", f"needs one value per s point ({xs.size}), got {ys.size}")
        if xs.size < 2:
            raise InputError("s", "needs at least the two points s=0 and s=1")
        order = np.argsort(xs, kind="stable")
        xs, ys = xs[order], ys[order]
        if np.any(np.diff(xs) <= 0):
            raise InputError("s", "points must be distinct")
        if xs[0] != 0.0 or xs[-1] != 1.0:
            raise InputError("s", "must start at 0 and end at 1")
        if ys[0] != 0.0 or ys[-1] != 1.0:
            raise InputError("g", "must have g(0)=0 and g(1)=1")
        if np.any(np.diff(ys) < 0):
            raise InputError("g", "must be non-decreasing in s")
        slopes = np.diff(ys) / np.diff(xs)
        concave = bool(np.all(np.diff(slopes) <= 1e-12 * max(1.0, slopes.max())))
        if self.require_concave and not concave:
            raise InputError("g", "must be concave (slopes non-increasing); pass require_concave=False to allow")
        object.__setattr__(self, "s", tuple(xs.tolist()))
        object.__setattr__(self, "g", tuple(ys.tolist()))
        object.__setattr__(self, "_xs", xs)
        object.__setattr__(self, "_ys", ys)
        object.__setattr__(self, "_concave", concave)

    def __repr__(self):
        def short(v):  # long tables print their first and last points only
            return repr(v) if len(v) <= 8 else f"({', '.join(f'{x:.6g}' for x in v[:3])}, ..., {', '.join(f'{x:.6g}' for x in v[-2:])})"

        more = f", {len(self.s)} points" if len(self.s) > 8 else ""
        return f"TableDistortion(s={short(self.s)}, g={short(self.g)}, require_concave={self.require_concave}{more})"

    def _g(self, s):
        return np.interp(s, self._xs, self._ys)

    @property
    def concave(self) -> bool:
        return self._concave

    def __hash__(self):
        return hash((self.s, self.g, self.require_concave))

    def label(self) -> str:
        return f"table({len(self.s)} points)"


FAMILIES: dict[str, type[Distortion]] = {
    "proportional_hazard": ProportionalHazard,
    "ph": ProportionalHazard,
    "wang": WangTransform,
    "dual_power": DualPower,
    "dual": DualPower,
    "tvar": TVaRDistortion,
    "cost_of_capital": CostOfCapital,
    "ccoc": CostOfCapital,
}


def make_distortion(family: str, value: float) -> Distortion:
    """Build a one-parameter distortion by family name (case and spaces ignored)."""
    if not isinstance(family, str):
        raise InputError("family", f"expected a family name, got {family!r}")
    key = family.strip().lower().replace(" ", "_").replace("-", "_")
    cls = FAMILIES.get(key)
    if cls is None:
        names = ", ".join(sorted({c.family for c in FAMILIES.values()}))
        raise InputError("family", f"unknown distortion family {family!r}; choose one of {names}")
    return cls(value)
