"""Shared by the reference tests: closed forms of the lognormal and Pareto (Lomax) severities.

Limited expected values E[X ^ d], survival and density as tabulated in
Klugman, Panjer & Willmot, *Loss Models: From Data to Decisions*, Appendix A.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special


def lognormal_params(mean, cv):
    """(mu, sigma) of a lognormal with this mean and cv: sigma^2 = ln(1 + cv^2), mu = ln(mean) - sigma^2 / 2."""
    sigma = math.sqrt(math.log1p(cv * cv))
    return math.log(mean) - 0.5 * sigma * sigma, sigma


def lognormal_lev(d, mu, sigma):
    """E[X ^ d] = exp(mu + sigma^2/2) Phi((ln d - mu - sigma^2)/sigma) + d (1 - Phi((ln d - mu)/sigma))."""
    d = np.asarray(d, dtype=float)
    with np.errstate(divide="ignore"):
        z = np.log(d)
    return np.exp(mu + 0.5 * sigma**2) * special.ndtr((z - mu - sigma**2) / sigma) + d * special.ndtr(-(z - mu) / sigma)


def lognormal_sf(x, mu, sigma):
    with np.errstate(divide="ignore"):
        return special.ndtr(-(np.log(np.asarray(x, dtype=float)) - mu) / sigma)


def lognormal_pdf(x, mu, sigma):
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.exp(-0.5 * ((np.log(x) - mu) / sigma) ** 2) / (x * sigma * math.sqrt(2.0 * math.pi))
    return np.where(x > 0, out, 0.0)


def pareto_lev(d, alpha, theta):
    """E[X ^ d] = theta/(alpha-1) [1 - (theta/(d+theta))^(alpha-1)]; theta ln(1 + d/theta) at alpha = 1."""
    d = np.asarray(d, dtype=float)
    if abs(alpha - 1.0) < 1e-15:
        return theta * np.log1p(d / theta)
    return theta / (alpha - 1.0) * (1.0 - (theta / (d + theta)) ** (alpha - 1.0))


def pareto_sf(x, alpha, theta):
    return (theta / (np.asarray(x, dtype=float) + theta)) ** alpha


def pareto_pdf(x, alpha, theta):
    return alpha * theta**alpha / (np.asarray(x, dtype=float) + theta) ** (alpha + 1.0)
