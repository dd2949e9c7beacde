"""Claim-count (frequency) distributions, described by their probability generating function.

Each frequency is a small immutable object with ``mean``, ``variance``,
``ppf`` (for grid sizing) and ``pgf(z)`` evaluated on complex arrays, which is
all the Fourier aggregation needs.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from .errors import InputError, as_float

__all__ = ["Frequency", "Poisson", "NegativeBinomial", "Binomial", "FixedCount", "poisson", "negative_binomial", "binomial", "fixed_count", "make_frequency"]


class Frequency:
    """Base class for claim-count distributions."""

    def pgf(self, z: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def pgf_in_place(self, z: np.ndarray) -> np.ndarray:
        """``pgf(z)``, allowed to overwrite ``z`` (a scratch array) to save temporaries."""
        return self.pgf(z)

    @property
    def cv(self) -> float:
        return math.sqrt(self.variance) / self.mean if self.mean > 0 else 0.0

    def ppf(self, q: float) -> float:
        return float(self._scipy().ppf(q))

    def pmf(self, k):
        return self._scipy().pmf(k)

    def thinned_ppf(self, q: float, p: float) -> float:
        """Quantile of the number of claims when each one counts independently with probability ``p``.

        (E.g. the claims that reach a layer's attachment.) Poisson, negative
        binomial and binomial counts thin to the same family with the mean
        times p (same contagion); a fixed count thins to a binomial.
        """
        if not p > 0:
            return 0.0
        return float(self._scipy_thinned(min(float(p), 1.0)).ppf(q))

    def _scipy_thinned(self, p: float):  # pragma: no cover - abstract
        raise NotImplementedError

    @property
    def max_count(self) -> float:
        """Largest possible number of claims (inf when unbounded)."""
        return math.inf


@dataclass(frozen=True)
class Poisson(Frequency):
    """Poisson with mean ``mean``."""

    mean: float

    def __post_init__(self):
        object.__setattr__(self, "mean", as_float(self.mean, "mean", low=0.0, low_open=True, high=1e7))

    @property
    def variance(self):
        return self.mean

    def pgf(self, z):
        return np.exp(self.mean * (z - 1.0))

    def pgf_in_place(self, z):
        z -= 1.0
        z *= self.mean  # the same products as mean * (z - 1)
        return np.exp(z, out=z)

    def _scipy(self):
        return stats.poisson(self.mean)

    def _scipy_thinned(self, p):
        return stats.poisson(self.mean * p)


@dataclass(frozen=True)
class NegativeBinomial(Frequency):
    """Negative binomial with mean ``mean`` and contagion ``c``: variance = mean + c * mean**2.

    (Gamma-mixed Poisson with mixing CV sqrt(c); as c -> 0 it becomes Poisson.)
    """

    mean: float
    contagion: float

    def __post_init__(self):
        object.__setattr__(self, "mean", as_float(self.mean, "mean", low=0.0, low_open=True, high=1e7))
        object.__setattr__(self, "contagion", as_float(self.contagion, "contagion", low=0.0, low_open=True, high=1e6))

    @property
    def variance(self):
        return self.mean + self.contagion * self.mean**2

    def pgf(self, z):
        # r = 1/c, beta = c * mean: P(z) = (1 - beta (z - 1))**(-r); principal branch is safe for |z| <= 1.
        return (1.0 - self.contagion * self.mean * (z - 1.0)) ** (-1.0 / self.contagion)

    def _scipy(self):
        return self._scipy_thinned(1.0)

    def _scipy_thinned(self, p):
        return stats.nbinom(1.0 / self.contagion, 1.0 / (1.0 + self.contagion * self.mean * p))


@dataclass(frozen=True)
class Binomial(Frequency):
    """Binomial: ``n`` independent exposures each claiming with probability ``q``."""

    n: int
    q: float

    def __post_init__(self):
        n = as_float(self.n, "n", low=1.0, high=1e7)
        if n != int(n):
            raise InputError("n", f"must be a whole number, got {n:g}")
        object.__setattr__(self, "n", int(n))
        object.__setattr__(self, "q", as_float(self.q, "q", low=0.0, high=1.0, low_open=True))

    @property
    def mean(self):
        return self.n * self.q

    @property
    def variance(self):
        return self.n * self.q * (1.0 - self.q)

    def pgf(self, z):
        return (1.0 + self.q * (z - 1.0)) ** self.n

    @property
    def max_count(self) -> float:
        return float(self.n)

    def _scipy(self):
        return stats.binom(self.n, self.q)

    def _scipy_thinned(self, p):
        return stats.binom(self.n, self.q * p)


@dataclass(frozen=True)
class FixedCount(Frequency):
    """Exactly ``n`` claims every year."""

    n: int

    def __post_init__(self):
        n = as_float(self.n, "n", low=1.0, high=1e7)
        if n != int(n):
            raise InputError("n", f"must be a whole number, got {n:g}")
        object.__setattr__(self, "n", int(n))

    @property
    def mean(self):
        return float(self.n)

    @property
    def variance(self):
        return 0.0

    def pgf(self, z):
        return z**self.n

    @property
    def max_count(self) -> float:
        return float(self.n)

    def ppf(self, q):
        return float(self.n)

    def pmf(self, k):
        return np.where(np.asarray(k) == self.n, 1.0, 0.0)

    def _scipy_thinned(self, p):
        return stats.binom(self.n, p)


def poisson(mean) -> Poisson:
    return Poisson(mean)


def negative_binomial(mean, cv=None, *, contagion=None) -> NegativeBinomial:
    """Negative binomial by ``mean`` and count ``cv`` (must exceed Poisson's 1/sqrt(mean)) or by ``contagion``."""
    if (cv is None) == (contagion is None):
        raise InputError("cv", "give exactly one of cv or contagion")
    mean = as_float(mean, "mean", low=0.0, low_open=True, high=1e7)
    if contagion is None:
        cv = as_float(cv, "cv", low=0.0, low_open=True)
        contagion = cv * cv - 1.0 / mean
        if contagion <= 0:
            raise InputError("cv", f"must exceed the Poisson cv 1/sqrt(mean) = {1 / math.sqrt(mean):.6g}, got {cv:.6g}")
    return NegativeBinomial(mean, contagion)


def binomial(n, q) -> Binomial:
    return Binomial(n, q)


def fixed_count(n) -> FixedCount:
    return FixedCount(n)


def make_frequency(name: str, *params) -> Frequency:
    """Frequency by name with positional parameters: poisson(mean), negative_binomial(mean, cv),
    binomial(n, q), fixed(n)."""
    if not isinstance(name, str):
        raise InputError("frequency", f"expected a name, got {name!r}")
    key = name.strip().lower().replace(" ", "_").replace("-", "_")
    table = {
        "poisson": (poisson, 1),
        "negative_binomial": (negative_binomial, 2),
        "negbin": (negative_binomial, 2),
        "binomial": (binomial, 2),
        "fixed": (fixed_count, 1),
        "fixed_count": (fixed_count, 1),
    }
    if key not in table:
        raise InputError("frequency", f"unknown frequency {name!r}; choose poisson, negative_binomial, binomial or fixed")
    ctor, k = table[key]
    if len(params) != k:
        raise InputError("parameters", f"{key} takes {k} parameter(s), got {len(params)}")
    return ctor(*params)
