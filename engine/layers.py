"""Layer terms: what part of each loss, and of each year's total, a contract pays.

A :class:`Layer` holds the terms in one normal form:

* per-occurrence attachment and limit, applied to each loss (event) first;
* annual aggregate deductible and aggregate limit, applied to the year's sum
  of those per-occurrence payments;
* participation ``share`` of what is left.

An occurrence layer "l xs a" with n reinstatements has aggregate limit
l * (1 + n); a plain aggregate (stop-loss) layer on the annual total is an
aggregate deductible and limit with no per-occurrence terms.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import InputError, as_float

__all__ = ["Layer", "stack"]


@dataclass(frozen=True)
class Layer:
    """Layer terms in normal form (amounts in the model's currency units)."""

    occ_attachment: float = 0.0
    occ_limit: float = math.inf
    agg_attachment: float = 0.0
    agg_limit: float = math.inf
    share: float = 1.0

    def __post_init__(self):
        set_ = object.__setattr__
        set_(self, "occ_attachment", as_float(self.occ_attachment, "attachment", low=0.0))
        set_(self, "occ_limit", as_float(self.occ_limit, "limit", low=0.0, low_open=True, allow_inf=True))
        set_(self, "agg_attachment", as_float(self.agg_attachment, "aggregate deductible", low=0.0))
        set_(self, "agg_limit", as_float(self.agg_limit, "aggregate limit", low=0.0, low_open=True, allow_inf=True))
        set_(self, "share", as_float(self.share, "share", low=0.0, high=1.0, low_open=True))

    # ------------------------------------------------------------- constructors
    @classmethod
    def occurrence(cls, attachment, limit, *, reinstatements=None, agg_deductible=0.0, agg_limit=None, share=1.0):
        """Per-occurrence layer ``limit xs attachment``.

        ``reinstatements`` (a whole number >= 0) sets the aggregate limit to
        limit * (1 + reinstatements); alternatively give ``agg_limit`` directly;
        with neither the aggregate is unlimited.
        """
        if reinstatements is not None and agg_limit is not None:
            raise InputError("reinstatements", "give reinstatements or an aggregate limit, not both")
        lim = as_float(limit, "limit", low=0.0, low_open=True, allow_inf=True)
        if reinstatements is not None:
            n = as_float(reinstatements, "reinstatements", low=0.0, allow_inf=True)
            if math.isfinite(n) and n != int(n):
                raise InputError("reinstatements", f"must be a whole number, got {n:g}")
            if not math.isfinite(lim) and n != math.inf:
                raise InputError("reinstatements", "need a finite limit")
            agg_limit = lim * (1.0 + n)
        return cls(attachment, lim, agg_deductible, math.inf if agg_limit is None else agg_limit, share)

    @classmethod
    def aggregate(cls, attachment, limit, *, share=1.0):
        """Aggregate (stop-loss) layer ``limit xs attachment`` on the annual total loss."""
        return cls(0.0, math.inf, attachment, limit, share)

    # ------------------------------------------------------------- properties
    @property
    def has_occurrence_terms(self) -> bool:
        return self.occ_attachment > 0 or math.isfinite(self.occ_limit)

    @property
    def is_aggregate(self) -> bool:
        return not self.has_occurrence_terms

    @property
    def attachment(self) -> float:
        """The attachment quoted for the layer: per occurrence, or on the annual total."""
        return self.occ_attachment if self.has_occurrence_terms else self.agg_attachment

    @property
    def limit(self) -> float:
        """The limit quoted for the layer (rate on line is premium / limit)."""
        return self.occ_limit if self.has_occurrence_terms else self.agg_limit

    @property
    def max_annual_loss(self) -> float:
        """Largest amount the layer can pay in a year, before share (inf if unbounded)."""
        return self.agg_limit

    @property
    def reinstatements(self) -> float | None:
        if not self.has_occurrence_terms or not math.isfinite(self.occ_limit):
            return None
        return self.agg_limit / self.occ_limit - 1.0 if math.isfinite(self.agg_limit) else math.inf

    def describe(self) -> str:
        def f(x):
            if not math.isfinite(x):
                return "unlimited"
            return f"{x:,.0f}" if x == round(x) and abs(x) < 1e15 else f"{x:,.6g}"

        if self.has_occurrence_terms:
            text = f"{f(self.occ_limit)} xs {f(self.occ_attachment)} per occurrence"
            if self.agg_attachment > 0:
                text += f", AAD {f(self.agg_attachment)}"
            if math.isfinite(self.agg_limit):
                r = self.reinstatements
                text += f", {r:g} reinstatement(s)" if r is not None and abs(r - round(r)) < 1e-12 else f", AAL {f(self.agg_limit)}"
        else:
            text = f"{f(self.agg_limit)} xs {f(self.agg_attachment)} aggregate"
        if self.share != 1.0:
            text += f", {self.share:.4g} share"
        return text


def stack(limits, *, start=0.0, basis="occurrence", reinstatements=None, share=1.0) -> list[Layer]:
    """Contiguous tower: layers of the given limits stacked from ``start`` upwards."""
    if basis not in ("occurrence", "aggregate"):
        raise InputError("basis", f"must be 'occurrence' or 'aggregate', got {basis!r}")
    out, a = [], as_float(start, "start", low=0.0)
    for lim in limits:
        lim = as_float(lim, "limits", low=0.0, low_open=True, allow_inf=True)
        if basis == "occurrence":
            out.append(Layer.occurrence(a, lim, reinstatements=reinstatements, share=share))
        else:
            out.append(Layer.aggregate(a, lim, share=share))
        a += lim
    return out
