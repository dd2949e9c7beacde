"""Sensitivities of layer premiums to the layer terms and to the distortion's parameter.

For an aggregate layer (attachment a, limit l, share s) on an annual loss with
step survival S, P(a, l) = s * integral_a^{a+l} g(S(x)) dx, so the
derivatives are exact (right-hand derivatives, since S is right-continuous):

* ``d_limit``                  dP/dl = s g(S(a + l))
* ``d_attachment_top_fixed``   dP/da with the top a + l held, = -s g(S(a))
* ``d_attachment``             dP/da with the limit held (the layer moves up),
                               = s (g(S(a + l)) - g(S(a)))

For per-occurrence layers the annual loss itself changes with the terms, so
the same three are forward (right-hand, like the exact ones) finite
differences with step ``term_step * limit``, each rebuilding the model's
annual distribution; for grid models the result includes the change in
discretisation between the two grids, so read it as approximate.

``d_parameter`` is dP/dtheta for a one-parameter distortion, by the central
difference (P(theta + d) - P(theta - d)) / (2 d) with d = ``parameter_step`` *
max(|theta|, 1): truncation error O(d**2), round-off about 1e-16 P / d. Near a
bound of the family the step is shrunk to stay inside it, and at the bound
itself the one-sided difference into the family is used (``method`` says
which). Families without a single parameter (blends, tables) get NaN.
"""
from __future__ import annotations

import math
from collections.abc import Mapping

import pandas as pd

from .distortions import Distortion
from .errors import InputError, as_float
from .layers import Layer
from .models import LossModel
from .pricing import _as_layers

__all__ = ["price_sensitivities", "SENSITIVITY_COLUMNS"]

SENSITIVITY_COLUMNS = ["layer", "attachment", "limit", "premium", "parameter", "value", "d_parameter",
                       "parameter_method", "d_attachment", "d_attachment_top_fixed", "d_limit", "terms_method"]


def _premium(model: LossModel, layer: Layer, g) -> float:
    u = model.annual(layer.occ_attachment, layer.occ_limit)
    return float(layer.share * u.layer_integral(layer.agg_attachment, layer.agg_limit, g))


def _parameter_derivative(price, g: Distortion, step: float):
    """(dP/dtheta, method) by central difference, one-sided at a bound."""
    if g.parameter is None:
        return math.nan, "none"
    theta = g.value
    d = step * max(abs(theta), 1.0)
    lo, hi = type(g).bounds

    def ok(t):
        try:
            type(g)(t)
            return True
        except InputError:
            return False

    room_up = hi - theta if ok(hi) else 0.5 * (hi - theta)
    room_down = theta - lo if ok(lo) else 0.5 * (theta - lo)
    if room_up > 0 and room_down > 0:
        d = min(d, room_up, room_down)
        return (price(g.with_value(theta + d)) - price(g.with_value(theta - d))) / (2.0 * d), "central"
    if room_up > 0:  # at the lower bound: forward difference
        d = min(d, room_up)
        return (price(g.with_value(theta + d)) - price(g)) / d, "forward"
    if room_down > 0:  # at the upper bound: backward difference
        d = min(d, room_down)
        return (price(g) - price(g.with_value(theta - d))) / d, "backward"
    return math.nan, "none"  # pragma: no cover - a family with a single point


def price_sensitivities(model: LossModel, layers, distortion, *, parameter_step: float = 1e-5,
                        term_step: float = 1e-4) -> pd.DataFrame:
    """Change in each layer's premium per unit change in the distortion parameter, attachment and limit.

    ``distortion`` is a Distortion or a dict name -> distortion (then a
    leading ``distortion`` column). Columns: :data:`SENSITIVITY_COLUMNS`
    (derivatives in currency per unit of the parameter, and currency per
    currency unit of attachment or limit, i.e. dimensionless).
    """
    if not isinstance(model, LossModel):
        raise InputError("model", f"expected a loss model, got {model!r}")
    lays = _as_layers(layers)
    if isinstance(distortion, Mapping):
        if not distortion:
            raise InputError("distortion", "no distortions given")
        frames = []
        for name, g in distortion.items():
            df = price_sensitivities(model, lays, g, parameter_step=parameter_step, term_step=term_step)
            df.insert(0, "distortion", name)
            frames.append(df)
        return pd.concat(frames, ignore_index=True)
    if not isinstance(distortion, Distortion):
        raise InputError("distortion", f"expected a distortion, got {distortion!r}")
    ps = as_float(parameter_step, "parameter_step", low=0.0, high=0.1, low_open=True)
    ts = as_float(term_step, "term_step", low=0.0, high=0.1, low_open=True)
    g = distortion
    rows = []
    for lay in lays:
        p = _premium(model, lay, g)
        dtheta, pmethod = _parameter_derivative(lambda h: _premium(model, lay, h), g, ps)
        if lay.has_occurrence_terms:
            d_a, d_a_top, d_l = _occurrence_terms(model, lay, g, p, ts)
            tmethod = "forward difference"
        else:
            u = model.annual()
            a, lim, s = lay.agg_attachment, lay.agg_limit, lay.share
            g_a = float(g(u.survival(a)))
            g_top = float(g(u.survival(a + lim))) if math.isfinite(lim) else 0.0
            d_a, d_a_top, d_l = s * (g_top - g_a), -s * g_a, s * g_top
            tmethod = "exact"
        rows.append({"layer": lay.describe(), "attachment": lay.attachment, "limit": lay.limit, "premium": p,
                     "parameter": g.parameter or "", "value": g.value if g.parameter else math.nan,
                     "d_parameter": dtheta, "parameter_method": pmethod, "d_attachment": d_a,
                     "d_attachment_top_fixed": d_a_top, "d_limit": d_l, "terms_method": tmethod})
    return pd.DataFrame(rows, columns=SENSITIVITY_COLUMNS)


def _occurrence_terms(model, lay: Layer, g, p: float, step: float):
    """Forward differences in the per-occurrence attachment and limit (aggregate terms kept)."""
    a, lim = lay.occ_attachment, lay.occ_limit
    d = step * (lim if math.isfinite(lim) else max(a, 1.0))

    def at(att, limit):
        agg = lay.agg_limit
        rein = lay.reinstatements
        # keep the number of reinstatements, not the aggregate amount, when the limit moves
        if rein is not None and math.isfinite(rein) and math.isfinite(limit):
            agg = limit * (1.0 + rein)
        return _premium(model, Layer(att, limit, lay.agg_attachment, agg, lay.share), g)

    d_a = (at(a + d, lim) - p) / d
    if math.isfinite(lim):
        d_l = (at(a, lim + d) - p) / d
        d_a_top = (at(a + d, lim - d) - p) / d
    else:
        d_l = 0.0
        d_a_top = d_a
    return d_a, d_a_top, d_l
