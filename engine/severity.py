"""Severity (single-loss size) distributions for frequency-severity models.

A :class:`Severity` wraps a frozen ``scipy.stats`` continuous distribution on
[0, inf) with the name and parameters the user gave, so that it prints
readably, hashes by value (models built from equal inputs are equal) and
exposes the few methods the engine needs: ``sf``, ``cdf``, ``ppf``, ``isf``,
``mean``, ``cv`` and ``limited_mean``.

Constructors take the parameters a pricing actuary quotes: a lognormal by its
mean and coefficient of variation (or by mu and sigma), a Pareto by shape and
scale, and so on. Any other continuous scipy distribution is available through
:func:`from_scipy`.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special, stats

from .errors import InputError, as_float

__all__ = [
    "Severity",
    "lognormal",
    "pareto",
    "single_pareto",
    "gamma",
    "weibull",
    "exponential",
    "generalized_pareto",
    "from_scipy",
    "SEVERITIES",
    "make_severity",
    "integral",
]


@dataclass(frozen=True)
class Severity:
    """A loss-size distribution on [0, inf).

    ``name`` and ``params`` (a tuple of (name, value) pairs) record how it was
    specified; ``dist`` is the frozen scipy distribution that does the work.
    """

    name: str
    params: tuple
    dist: object = field(compare=False, repr=False)
    fast_sf: object = field(default=None, compare=False, repr=False)  # same values as dist.sf, without scipy's checks
    # top of the support (inf for unbounded severities), read once: scipy's support() checks its arguments
    upper: float = field(init=False, compare=False, repr=False)

    def __post_init__(self):
        low, high = (float(x) for x in self.dist.support())
        object.__setattr__(self, "upper", high)
        if not low >= 0.0:
            raise InputError("severity", f"{self.name} must be supported on [0, inf); its support starts at {low:g}")

    def __repr__(self):
        inner = ", ".join(f"{k}={v:.6g}" if isinstance(v, float) else f"{k}={v!r}" for k, v in self.params)
        return f"{self.name}({inner})"

    def sf(self, x):
        return self.dist.sf(x) if self.fast_sf is None else self.fast_sf(x)

    def cdf(self, x):
        return self.dist.cdf(x)

    def ppf(self, q):
        fast = getattr(self.fast_sf, "ppf", None)
        return self.dist.ppf(q) if fast is None else fast(q)

    def isf(self, q):
        fast = getattr(self.fast_sf, "isf", None)
        return self.dist.isf(q) if fast is None else fast(q)

    @functools.cached_property
    def mean(self) -> float:
        """E[X]; inf when infinite. scipy's value when it is a number >= 0, else from the survival function
        (scipy gives NaN or even negative numbers for some valid parameters, e.g. invweibull with c <= 1)."""
        return _moment(self, 1)

    @functools.cached_property
    def variance(self) -> float:
        """Var X; inf when infinite (checked as for :attr:`mean`)."""
        return _moment(self, 2)

    @functools.cached_property
    def quadrature_points(self) -> tuple:
        """Median and 99% quantile: where adaptive quadrature of the survival should split (computed once)."""
        return float(self.ppf(0.5)), float(self.ppf(0.99))

    @property
    def cv(self) -> float:
        m, v = self.mean, self.variance
        return math.sqrt(v) / m if math.isfinite(v) and m > 0 else math.inf

    @property
    def finite_mean(self) -> bool:
        """True when E[X] is finite.

        scipy's mean is trusted when it is a finite number or +inf; when it is
        NaN (scipy gives NaN for some families whose mean does not exist, e.g.
        ``invweibull`` with c <= 1 or ``fisk`` with c <= 1) the tail integral of
        the survival function decides (see :func:`integral`). Pareto (Lomax)
        shape <= 1 and generalized Pareto shape >= 1 have infinite means.
        """
        return math.isfinite(self.mean)

    @property
    def finite_variance(self) -> bool:
        """True when Var X is finite (Pareto shape > 2, generalized Pareto shape < 1/2, ...)."""
        return math.isfinite(self.variance)

    def limited_mean(self, d) -> np.ndarray:
        """E[min(X, d)] = integral of sf from 0 to d, by adaptive quadrature (reference use)."""
        from scipy import integrate

        d = np.atleast_1d(np.asarray(d, dtype=float))
        out = np.empty_like(d)
        for i, di in enumerate(d):
            out[i] = integrate.quad(self.dist.sf, 0.0, di, limit=200)[0] if di > 0 else 0.0
        return out


_GL_X, _GL_W = np.polynomial.legendre.leggauss(12)
_RATIO = math.sqrt(2.0)  # consecutive pieces of :func:`integral` grow by this factor
_FAR = 1e300  # an integral still growing here is taken as infinite


def integral(sf, lo: float, hi: float = math.inf, distortion=None, *, scale: float = 1.0, first: float | None = None,
             rel_tol: float = 1e-6) -> float:
    """integral_lo^hi g(scale * sf(x)) dx (g the identity when ``distortion`` is None), inf when it diverges.

    For decreasing survival functions on [0, inf): the range is cut into
    pieces growing geometrically by sqrt(2) from ``lo`` (the first of length
    ``first``, default max(|lo|, 1) * 1e-9, so that pieces resolve the body
    near ``lo``) up to ``hi`` or 1e300, with 12-point Gauss-Legendre on each
    piece. For an infinite ``hi`` the integral is taken as infinite when the
    last eight pieces before the integrand vanishes (at x = 1e300, or where
    the survival function underflows or loses its precision, as scipy's
    1 - cdf does near 1e16) still add more than ``rel_tol`` of the total: a
    power tail x**-b is then found infinite for b <= 1, and for b only a
    little above 1 (about 1.05) too. Pass a finite ``hi`` for a bounded
    support. NaN survival values count as 0.
    """
    lo = float(lo)
    if not hi > lo:
        return 0.0
    step = float(first) if first is not None else max(abs(lo), 1.0) * 1e-9
    end = min(hi, _FAR)
    if lo + step >= end:
        edges = np.array([lo, end])
    else:
        k = math.ceil((math.log(end - lo) - math.log(step)) / math.log(_RATIO))  # as a difference of logs: no overflow for tiny steps
        edges = lo + np.concatenate([[0.0], step * _RATIO ** np.arange(k)])
        edges = np.append(edges[edges < end], end)
    left, width = edges[:-1], np.diff(edges)
    x = left[:, None] + 0.5 * width[:, None] * (_GL_X[None, :] + 1.0)
    with np.errstate(all="ignore"):
        s = np.asarray(sf(x.ravel()), dtype=float).reshape(x.shape)
        s = np.clip(np.nan_to_num(scale * s, nan=0.0), 0.0, 1.0)
        v = s if distortion is None else np.asarray(distortion(s), dtype=float).reshape(x.shape)
        pieces = 0.5 * width * (v @ _GL_W)
    total = float(pieces.sum())
    if not math.isfinite(total):
        return math.inf
    if math.isinf(hi) and total > 0:
        alive = np.flatnonzero(pieces > 0)
        last = int(alive[-1]) + 1
        if float(pieces[max(last - 8, 0):last].sum()) > rel_tol * total:
            return math.inf
    return total


def _moment(sev: "Severity", order: int) -> float:
    """Mean (order 1) or variance (order 2) of ``sev``: scipy's when plausible, else by :func:`integral`."""
    fast = getattr(sev.fast_sf, "mean" if order == 1 else "var", None)
    with np.errstate(all="ignore"):
        value = float(fast() if fast is not None else (sev.dist.mean() if order == 1 else sev.dist.var()))
    if value == math.inf or (math.isfinite(value) and value >= 0):
        return value
    # NaN or negative from scipy: E[X^k] = k * integral x^(k-1) S(x) dx (X >= 0)
    upper = sev.upper
    med = float(sev.ppf(0.5))
    med = med if math.isfinite(med) and med > 0 else 1.0
    m1 = integral(sev.sf, 0.0, upper, first=med * 1e-6)
    if order == 1 or not math.isfinite(m1):
        return m1
    half = integral(lambda x: x * sev.sf(x), 0.0, upper, first=med * 1e-6)
    return max(2.0 * half - m1 * m1, 0.0) if math.isfinite(half) else math.inf


def _positive(value, argument):
    return as_float(value, argument, low=0.0, low_open=True)


def lognormal(mean=None, cv=None, *, mu=None, sigma=None) -> Severity:
    """Lognormal by ``mean`` and ``cv`` (coefficient of variation), or by ``mu`` and ``sigma`` of log X."""
    if mu is not None or sigma is not None:
        if mean is not None or cv is not None:
            raise InputError("mean", "give either mean and cv, or mu and sigma, not both")
        if mu is None or sigma is None:
            raise InputError("sigma" if sigma is None else "mu", "mu and sigma go together")
        mu = as_float(mu, "mu")
        sigma = _positive(sigma, "sigma")
        params = (("mu", mu), ("sigma", sigma))
    else:
        if mean is None or cv is None:
            raise InputError("cv" if cv is None else "mean", "a lognormal needs mean and cv (or mu and sigma)")
        mean = _positive(mean, "mean")
        cv = _positive(cv, "cv")
        sigma = math.sqrt(math.log1p(cv * cv))
        mu = math.log(mean) - 0.5 * sigma * sigma
        params = (("mean", mean), ("cv", cv))
    scale = math.exp(mu)
    return Severity("lognormal", params, stats.lognorm(s=sigma, scale=scale), _LognormalSF(sigma, scale))


class _LognormalSF:
    """The lognormal survival function Phi(-log(x / scale) / sigma), as scipy computes it.

    scipy's ``lognorm.sf`` spends more than half of its time validating
    arguments and masking the support; on the grids this one gives the same
    numbers bit for bit (1 for x <= 0, NaN for NaN) in less than half the time.
    """

    __slots__ = ("sigma", "scale")

    def __init__(self, sigma: float, scale: float):
        self.sigma, self.scale = sigma, scale

    def __call__(self, x):
        if type(x) is float and x > 0.0:  # quadrature's scalar calls: the same ufuncs, without the array set-up
            return special.ndtr(-(np.log(x / self.scale) / self.sigma))
        x = np.asarray(x, dtype=np.float64)
        if not x.ndim:
            y = x / self.scale
            with np.errstate(divide="ignore", invalid="ignore"):
                out = special.ndtr(-(np.log(y) / self.sigma))
            return np.float64(1.0) if y < 0 else out[()]
        # in place on one scratch array: y / -sigma is -(y / sigma) bit for bit
        out = x / self.scale
        with np.errstate(divide="ignore", invalid="ignore"):
            np.log(out, out=out)
            np.divide(out, -self.sigma, out=out)
            special.ndtr(out, out=out)
        out[x < 0] = 1.0  # x / scale < 0 exactly where x < 0
        return out

    # quantiles as scipy computes them (scale * exp(sigma * Phi^-1)), without its argument checks;
    # isf through Phi^-1(q) itself, so far-tail levels keep their precision
    def ppf(self, q):
        q = np.asarray(q, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out = self.scale * np.exp(self.sigma * special.ndtri(q))
        return out if out.ndim else out[()]

    def isf(self, q):
        q = np.asarray(q, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out = self.scale * np.exp(-self.sigma * special.ndtri(q))
        return out if out.ndim else out[()]

    # mean and variance as scipy's lognorm computes them (its _stats, then scaled), without its machinery
    def mean(self):
        return float(np.sqrt(np.exp(self.sigma * self.sigma)) * self.scale + 0.0)

    def var(self):
        p = np.exp(self.sigma * self.sigma)
        return float(p * (p - 1.0) * self.scale * self.scale)

    def layer_mean(self, a: float, b: float) -> float:
        """integral_a^b S(x) dx, 0 <= a < b <= inf, in closed form.

        By parts, b S(b) - a S(a) + E[X; a < X <= b], with the partial
        expectation exp(mu + sigma^2 / 2) (Phi(sigma - z(a)) - Phi(sigma - z(b))),
        z(x) = log(x / scale) / sigma (Klugman, Panjer & Willmot, Loss Models,
        App. A, the lognormal's limited expected value). Written with upper
        tails so that a remote layer keeps its relative precision.
        """
        sigma = self.sigma

        def tails(x):  # (x S(x), P-weighted upper tail Phi(sigma - z(x))) at x
            if x <= 0.0:
                return 0.0, 1.0
            if x == math.inf:
                return 0.0, 0.0
            z = math.log(x / self.scale) / sigma
            return x * float(special.ndtr(-z)), float(special.ndtr(sigma - z))

        (sa, ua), (sb, ub) = tails(a), tails(b)
        return max(sb - sa + self.scale * math.exp(0.5 * sigma * sigma) * (ua - ub), 0.0)

    def __reduce__(self):
        return (_LognormalSF, (self.sigma, self.scale))


def pareto(shape, scale) -> Severity:
    """Pareto of the second kind (Lomax) on [0, inf): S(x) = (scale / (scale + x))**shape."""
    shape = _positive(shape, "shape")
    scale = _positive(scale, "scale")
    return Severity("pareto", (("shape", shape), ("scale", scale)), stats.lomax(c=shape, scale=scale))


def single_pareto(shape, threshold) -> Severity:
    """Single-parameter Pareto on [threshold, inf): S(x) = (threshold / x)**shape."""
    shape = _positive(shape, "shape")
    threshold = _positive(threshold, "threshold")
    return Severity("single_pareto", (("shape", shape), ("threshold", threshold)), stats.pareto(b=shape, scale=threshold))


def gamma(shape=None, scale=None, *, mean=None, cv=None) -> Severity:
    """Gamma by ``shape`` and ``scale``, or by ``mean`` and ``cv`` (shape = 1/cv**2)."""
    if mean is not None or cv is not None:
        if shape is not None or scale is not None:
            raise InputError("mean", "give either shape and scale, or mean and cv, not both")
        if mean is None or cv is None:
            raise InputError("cv" if cv is None else "mean", "mean and cv go together")
        mean = _positive(mean, "mean")
        cv = _positive(cv, "cv")
        k = 1.0 / (cv * cv)
        return Severity("gamma", (("mean", mean), ("cv", cv)), stats.gamma(a=k, scale=mean / k))
    if shape is None or scale is None:
        raise InputError("scale" if scale is None else "shape", "a gamma needs shape and scale (or mean and cv)")
    shape = _positive(shape, "shape")
    scale = _positive(scale, "scale")
    return Severity("gamma", (("shape", shape), ("scale", scale)), stats.gamma(a=shape, scale=scale))


def weibull(shape, scale) -> Severity:
    """Weibull: S(x) = exp(-(x / scale)**shape)."""
    shape = _positive(shape, "shape")
    scale = _positive(scale, "scale")
    return Severity("weibull", (("shape", shape), ("scale", scale)), stats.weibull_min(c=shape, scale=scale))


def exponential(mean) -> Severity:
    """Exponential with the given mean."""
    mean = _positive(mean, "mean")
    return Severity("exponential", (("mean", mean),), stats.expon(scale=mean))


def generalized_pareto(shape, scale) -> Severity:
    """Generalized Pareto on [0, inf): S(x) = (1 + shape * x / scale)**(-1/shape), shape >= 0."""
    shape = as_float(shape, "shape", low=0.0)
    scale = _positive(scale, "scale")
    return Severity("generalized_pareto", (("shape", shape), ("scale", scale)), stats.genpareto(c=shape, scale=scale))


def from_scipy(name: str, *args, **kwargs) -> Severity:
    """Any continuous ``scipy.stats`` distribution on [0, inf), by name and scipy's own parameters."""
    if not isinstance(name, str) or not name.strip():
        raise InputError("name", f"expected a scipy.stats distribution name, got {name!r}")
    key = name.strip()
    family = getattr(stats, key, None)
    if not isinstance(family, stats.rv_continuous):
        raise InputError("name", f"{key!r} is not a continuous scipy.stats distribution")
    for i, a in enumerate(args):
        as_float(a, f"parameter {i + 1}")
    for k, a in kwargs.items():
        as_float(a, k)
    try:
        frozen = family(*args, **kwargs)
        frozen.support()
    except (TypeError, ValueError) as exc:
        raise InputError("parameters", f"scipy.stats.{key} rejected them: {exc}") from None
    # a NaN mean is no sign of bad parameters: scipy gives NaN for some valid families whose mean
    # is infinite (invweibull, fisk, burr12 with small shapes); Severity.finite_mean sorts those out
    if not np.all(family._argcheck(*frozen.args[: family.numargs])):
        raise InputError("parameters", f"invalid parameters for scipy.stats.{key}: {args} {kwargs}")
    params = tuple((f"p{i + 1}", float(a)) for i, a in enumerate(args)) + tuple((k, float(v)) for k, v in sorted(kwargs.items()))
    return Severity(f"scipy.{key}", params, frozen)


SEVERITIES = {
    "lognormal": lognormal,
    "pareto": pareto,
    "single_pareto": single_pareto,
    "gamma": gamma,
    "weibull": weibull,
    "exponential": exponential,
    "generalized_pareto": generalized_pareto,
}


_POSITIONAL = {
    "lognormal": ("mean", "cv"),
    "pareto": ("shape", "scale"),
    "single_pareto": ("shape", "threshold"),
    "gamma": ("mean", "cv"),
    "weibull": ("shape", "scale"),
    "exponential": ("mean",),
    "generalized_pareto": ("shape", "scale"),
}


def make_severity(name: str, *params) -> Severity:
    """Severity by name with positional parameters (as a cell would give them).

    ``lognormal`` takes (mean, cv); ``gamma`` (mean, cv); others as their
    constructors; any other name is looked up in scipy.stats.
    """
    if not isinstance(name, str) or not name.strip():
        raise InputError("severity", f"expected a distribution name, got {name!r}")
    key = name.strip().lower().replace(" ", "_").replace("-", "_")
    ctor = SEVERITIES.get(key)
    if ctor is None:
        return from_scipy(name.strip(), *params)
    names = _POSITIONAL[key]
    if len(params) != len(names):
        # checked here: a wrong count would otherwise be ignored (gamma took a third value silently)
        # or reported with the constructor's keyword-only names
        raise InputError("parameters", f"{key} takes {len(names)} parameter(s) ({', '.join(names)}), got {len(params)}")
    if key == "gamma":
        return gamma(mean=params[0], cv=params[1])
    return ctor(*params)
