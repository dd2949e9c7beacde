"""Numerical guards: grid results carry their diagnostics, and past a tolerance they warn (engine) or
become error values (cells) instead of silently wrong numbers; heavy tails are handled explicitly.

Reference values come from scipy (closed forms or adaptive quadrature of scipy survival functions),
never from the grid being checked.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import integrate, stats

import layerwise.engine as lw
from layerwise.addin import cells, handles
from layerwise.addin.functions import FUNCTIONS as F
from layerwise.engine import models, pricing
from layerwise.engine.fourier import MAX_GRID_LENGTH
from layerwise.engine.severity import integral

TOL = pricing.DISCRETISATION_TOLERANCE


def quad_layer(sf, a, l, g=None):
    """integral_a^{a+l} g(sf(x)) dx by scipy's adaptive quadrature (split where the integrand bends)."""
    g = g or (lambda s: s)
    top = a + l
    pts = [p for p in np.geomspace(max(a, 1.0), top, 12)[1:-1]] if math.isfinite(top) else None
    if math.isfinite(top):
        return integrate.quad(lambda x: float(g(sf(x))), a, top, points=pts, limit=500, epsabs=0, epsrel=1e-12)[0]
    return integrate.quad(lambda x: float(g(sf(x))), a, np.inf, limit=500, epsabs=0, epsrel=1e-12)[0]


def quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", lw.GridWarning)
        return fn(*args, **kwargs)


# =========================================================================== heavy tails: detection
@pytest.mark.parametrize("sev, mean_finite, var_finite", [
    (lw.pareto(0.5, 1e6), False, False),
    (lw.pareto(0.8, 1e6), False, False),
    (lw.pareto(1.0, 1e6), False, False),  # shape <= 1: infinite mean
    (lw.pareto(1.5, 1e6), True, False),
    (lw.pareto(2.0, 1e6), True, False),  # shape <= 2: infinite variance
    (lw.pareto(2.5, 1e6), True, True),
    (lw.generalized_pareto(1.0, 1e6), False, False),  # shape >= 1: infinite mean
    (lw.generalized_pareto(1.4, 1e6), False, False),
    (lw.generalized_pareto(0.5, 1e6), True, False),  # shape >= 1/2: infinite variance
    (lw.generalized_pareto(0.7, 1e6), True, False),
    (lw.generalized_pareto(0.3, 1e6), True, True),
    (lw.single_pareto(0.9, 1e5), False, False),
    (lw.from_scipy("invweibull", 0.5, scale=1e6), False, False),  # scipy's mean is NaN here
    (lw.from_scipy("invweibull", 1.5, scale=1e6), True, False),
    (lw.from_scipy("fisk", 1.0, scale=1e6), False, False),  # NaN from scipy, log-divergent
    (lw.from_scipy("burr12", 1.0, 0.6, scale=1e6), False, False),
    (lw.from_scipy("halfcauchy", scale=1e6), False, False),
    (lw.from_scipy("levy", scale=1e6), False, False),
    (lw.lognormal(1e6, 5.0), True, True),
    (lw.from_scipy("uniform", scale=1e6), True, True),
])
def test_infinite_moments_are_detected(sev, mean_finite, var_finite):
    assert sev.finite_mean is mean_finite
    assert sev.finite_variance is var_finite
    assert lw.FrequencySeverity(lw.poisson(2), sev).infinite_mean is (not mean_finite)


def test_tail_integral_matches_closed_forms_and_finds_divergence():
    # Lomax: integral_a^inf (s/(s+x))^alpha dx = s^alpha (s+a)^(1-alpha) / (alpha - 1)
    for alpha in (1.2, 1.5, 3.0):
        s, a = 2.0, 5.0
        want = s**alpha * (s + a) ** (1 - alpha) / (alpha - 1)
        assert integral(stats.lomax(alpha, scale=s).sf, a, first=1e-3) == pytest.approx(want, rel=1e-9)
    assert integral(stats.lomax(1.0).sf, 0.0, first=1e-3) == math.inf
    assert integral(stats.lomax(0.7).sf, 0.0, first=1e-3) == math.inf
    # proportional hazard r on a Pareto tail is infinite exactly when r * alpha <= 1
    ph = lw.ProportionalHazard(0.6)
    assert integral(stats.lomax(1.5).sf, 0.0, distortion=ph, first=1e-3) == math.inf
    assert integral(stats.lomax(2.0).sf, 0.0, distortion=ph, first=1e-3) == pytest.approx(1 / (2.0 * 0.6 - 1), rel=1e-8)
    # a finite range and light tails
    assert integral(stats.expon().sf, 0.0, first=1e-6) == pytest.approx(1.0, rel=1e-12)
    assert integral(stats.expon().sf, 1.0, 3.0) == pytest.approx(math.exp(-1) - math.exp(-3), rel=1e-12)


# =========================================================================== heavy tails: pricing
INFINITE_MEAN = [lw.pareto(0.8, 1e6), lw.pareto(1.0, 1e6), lw.generalized_pareto(1.2, 5e5), lw.from_scipy("invweibull", 0.7, scale=1e6)]


@pytest.mark.parametrize("sev", INFINITE_MEAN, ids=repr)
def test_infinite_mean_unlimited_layer_is_refused_saying_why(sev):
    model = lw.FrequencySeverity(lw.poisson(2), sev)
    for layer in (lw.Layer.occurrence(0.0, math.inf), lw.Layer.occurrence(1e6, math.inf), lw.Layer.aggregate(5e6, math.inf)):
        with pytest.raises(lw.InputError) as err:
            lw.price_layers(model, [layer], lw.WangTransform(0.2))
        assert err.value.argument == "limit" and "infinite" in err.value.message and "expected loss" in err.value.message
        with pytest.raises(lw.InputError):
            lw.layer_statistics(model, [layer])
    spec = handles.freqsev_spec(lw.poisson(2), sev)
    out = F["LW_PREMIUM"](spec, 1e6, "unlimited", "wang 0.2")
    info = cells.parse_error(out)
    assert (info.code, info.argument) == ("#VALUE!", "limit") and "infinite" in info.message
    out = F["LW_TOWER"](spec, 0.0, [[1e6], [4e6], ["unlimited"]], "wang 0.2")
    assert cells.parse_error(out).argument == "limits" and "layer 3" in out


@pytest.mark.parametrize("sev", INFINITE_MEAN + [lw.pareto(1.5, 1e6), lw.generalized_pareto(0.7, 1e6)], ids=repr)
def test_heavy_tail_finite_layers_price_and_match_quadrature(sev):
    """Per-occurrence expected loss = lambda * integral_a^{a+l} S_X (Poisson); one claim a year makes the
    annual loss X itself, so an aggregate layer's premium is integral_a^{a+l} g(S_X) dx."""
    lam, g = 2.0, lw.ProportionalHazard(0.7)
    model = lw.FrequencySeverity(lw.poisson(lam), sev)
    a, l = 1e6, 4e6
    row = lw.price_layers(model, [lw.Layer.occurrence(a, l)], g).iloc[0]
    assert row["warning"] == ""
    assert row["expected_loss"] == pytest.approx(lam * quad_layer(sev.sf, a, l), rel=TOL)
    one = lw.FrequencySeverity(lw.fixed_count(1), sev)
    for lay_a, lay_l in ((0.0, 1e6), (1e6, 4e6), (1e7, 4e7)):
        row = lw.price_layers(one, [lw.Layer.aggregate(lay_a, lay_l)], g).iloc[0]
        want = quad_layer(sev.sf, lay_a, lay_l, g)
        # the guarantee: a row without a warning is within tolerance; a row outside it says so
        if row["warning"] == "":
            assert abs(row["premium"] - want) <= TOL * want, (lay_a, lay_l, row["premium"], want)
        else:
            assert "discretisation" in row["warning"]
        assert abs(row["premium"] - want) <= row["discretisation_error"] + row["grid_error"] + 1e-12 * want


@pytest.mark.parametrize("sev", [lw.pareto(0.8, 1e6), lw.pareto(1.5, 1e6), lw.generalized_pareto(0.7, 1e6), lw.pareto(2.0, 1e6)], ids=repr)
def test_grid_does_not_depend_on_infinite_moments(sev):
    model = lw.FrequencySeverity(lw.poisson(3), sev)
    h, n = model.grid()
    # resolution from the body: min(mean, 90% quantile), or the median when the mean is infinite
    ref = min(sev.mean, float(sev.ppf(0.9))) if sev.finite_mean else float(sev.ppf(0.5))
    assert math.isfinite(h) and 0 < h <= ref / 16 and n <= models.MAX_AUTO_POINTS
    u = model.annual()
    assert u.diagnostics["bucket"] == h and u.diagnostics["grid_top"] == h * n
    if not sev.finite_variance:
        # the tail is cut where the points run out, and the mass beyond is reported, not hidden
        assert u.beyond > models.BEYOND_TARGET or u.top * h > 0
    occ_h, occ_n = model.grid(1e6, 5e6)
    assert (5e6 / occ_h) == round(5e6 / occ_h) and occ_n <= 2**20


def test_unlimited_layer_with_infinite_variance_brackets_the_exact_expected_loss():
    """Lomax: E[(X - a)+] = (s + a) / (alpha - 1) * (s / (s + a))**alpha; the grid value is a lower bound and
    grid_error covers the rest."""
    alpha, s, lam = 1.5, 1e6, 2.0
    model = lw.FrequencySeverity(lw.poisson(lam), lw.pareto(alpha, s))
    for a in (0.0, 1e6):
        row = quiet(lw.price_layers, model, [lw.Layer.occurrence(a, math.inf)], lw.TVaRDistortion(0.0)).iloc[0]
        want = lam * (s + a) / (alpha - 1) * (s / (s + a)) ** alpha
        assert row["expected_loss"] <= want * (1 + TOL)
        assert want - row["expected_loss"] <= row["grid_error"] + row["discretisation_error"]
        assert row["grid_error"] < 0.2 * want  # an estimate, not an unbounded blank cheque


def test_premium_that_may_be_infinite_says_so():
    # PH r = 0.6 on a Pareto 1.5 tail: integral of x^(-0.9) diverges, the true premium is infinite
    model = lw.FrequencySeverity(lw.poisson(2), lw.pareto(1.5, 1e6))
    with pytest.warns(lw.GridWarning):
        row = lw.price_layers(model, [lw.Layer.occurrence(0.0, math.inf)], lw.ProportionalHazard(0.6)).iloc[0]
    assert row["grid_error"] == math.inf and "infinite" in row["warning"]
    spec = handles.freqsev_spec(lw.poisson(2), lw.pareto(1.5, 1e6))
    info = cells.parse_error(F["LW_PREMIUM"](spec, 0.0, "unlimited", "ph 0.6"))
    assert (info.code, info.function, info.argument) == ("#NUM!", "LW_PREMIUM", "model") and "infinite" in info.message
    # a constant cost of capital charges every unit of an unbounded layer: infinite too
    with pytest.warns(lw.GridWarning):
        row = lw.price_layers(model, [lw.Layer.occurrence(0.0, math.inf)], lw.CostOfCapital(0.1)).iloc[0]
    assert row["grid_error"] == math.inf
    # with a finite limit the same distortions price without complaint
    row = lw.price_layers(model, [lw.Layer.occurrence(1e6, 5e6)], lw.ProportionalHazard(0.6)).iloc[0]
    assert row["warning"] == "" and math.isfinite(row["premium"])


def test_unlimited_layer_on_a_light_tail_prices_within_tolerance():
    # one exponential claim a year: PH price of (a, inf) is theta / r * exp(-r a / theta)
    theta, r = 1e6, 0.8
    model = lw.FrequencySeverity(lw.fixed_count(1), lw.exponential(theta))
    for a in (0.0, 2e6):
        row = lw.price_layers(model, [lw.Layer.occurrence(a, math.inf)], lw.ProportionalHazard(r)).iloc[0]
        want = theta / r * math.exp(-r * a / theta)
        assert row["warning"] == ""
        assert row["premium"] == pytest.approx(want, rel=TOL)
        assert row["grid_error"] <= pricing.BEYOND_TOLERANCE * want


# =========================================================================== tolerances: warn or error, never silently off
def test_well_resolved_results_are_within_the_stated_tolerance():
    """Three exponential claims a year: the annual loss is gamma(3, theta), priced by quadrature of scipy's sf."""
    theta = 1e6
    model = lw.FrequencySeverity(lw.fixed_count(3), lw.exponential(theta))
    ref = stats.gamma(3, scale=theta)
    layers = [lw.Layer.aggregate(a, l) for a, l in ((0.0, 5e5), (1e6, 1e6), (2e6, 3e6), (5e6, 1e7), (1.5e7, 1e7))]
    for g in (lw.ProportionalHazard(0.7), lw.WangTransform(0.4), lw.DualPower(2.0), lw.TVaRDistortion(0.9)):
        df = lw.price_layers(model, layers, g)
        for lay, (_, row) in zip(layers, df.iterrows()):
            want = quad_layer(ref.sf, lay.agg_attachment, lay.agg_limit, g)
            assert row["warning"] == ""
            assert abs(row["premium"] - want) <= TOL * want, (g, lay, row["premium"], want)
            # the estimate is conservative: it covers the actual error
            assert abs(row["premium"] - want) <= row["discretisation_error"] + 1e-12 * want


def test_a_coarse_grid_warns_in_the_table_and_errors_in_a_cell():
    sev, freq = lw.lognormal(1e6, 1.5), lw.poisson(2)
    coarse = lw.FrequencySeverity(freq, sev, bucket=5e5)
    layer = lw.Layer.aggregate(1e6, 1e6)
    with pytest.warns(lw.GridWarning, match="discretisation"):
        row = lw.price_layers(coarse, [layer], lw.WangTransform(0.3)).iloc[0]
    assert "discretisation error estimate" in row["warning"] and row["discretisation_error"] > TOL * row["premium"]
    fine = lw.price_layers(lw.FrequencySeverity(freq, sev), [layer], lw.WangTransform(0.3)).iloc[0]
    assert fine["warning"] == ""
    # the coarse price really is off by more than the tolerance: the warning was needed
    assert abs(row["premium"] - fine["premium"]) > TOL * fine["premium"]
    spec = handles.freqsev_spec(freq, sev, bucket=5e5)
    for name in ("LW_PREMIUM", "LW_MARGIN", "LW_LOSS_RATIO", "LW_RATE_ON_LINE", "LW_CAPITAL", "LW_RETURN_ON_CAPITAL"):
        info = cells.parse_error(F[name](spec, 1e6, 1e6, "wang 0.3", None, "aggregate"))
        assert (info.code, info.function, info.argument) == ("#NUM!", name, "model"), name
        assert "tolerance" in info.message
    info = cells.parse_error(F["LW_LAYER_STAT"](spec, 1e6, 1e6, "std", None, None, "aggregate"))
    assert info.code == "#NUM!"
    table = F["LW_TOWER"](spec, [[1e6]], [[1e6]], "wang 0.3", None, "aggregate", None, None, "premium")
    assert table[0] == ["premium", "warning"] and "discretisation" in table[1][1]


def test_a_short_grid_bounds_what_lies_beyond_its_top():
    sev, freq = lw.gamma(mean=1e6, cv=0.5), lw.poisson(4)
    short = lw.FrequencySeverity(freq, sev, bucket=2.5e4, grid_length=256)  # top at 6.4e6, mean 4e6
    layer = lw.Layer.aggregate(5e6, 5e6)
    with pytest.warns(lw.GridWarning, match="beyond the grid top"):
        row = lw.price_layers(short, [layer], lw.ProportionalHazard(0.8)).iloc[0]
    full = lw.price_layers(lw.FrequencySeverity(freq, sev), [layer], lw.ProportionalHazard(0.8)).iloc[0]
    assert full["warning"] == ""
    assert row["premium"] < full["premium"] <= row["premium"] + row["grid_error"] + row["discretisation_error"]


def test_mean_mismatch_warns():
    # rounding with a bucket as large as the mean: the grid's severity mean is visibly off
    model = lw.FrequencySeverity(lw.poisson(2), lw.exponential(1e6), bucket=1e6, method="rounding")
    with pytest.warns(lw.GridWarning):
        row = lw.price_layers(model, [lw.Layer.aggregate(0.0, 1e7)], lw.WangTransform(0.2)).iloc[0]
    assert "severity mean" in row["warning"]


def test_every_grid_result_carries_its_diagnostics():
    model = lw.FrequencySeverity(lw.negative_binomial(3, 0.8), lw.lognormal(1e6, 2.0))
    for terms in ((0.0, math.inf), (1e6, 4e6), (5e5, math.inf)):
        d = dict(model.annual(*terms).diagnostics)
        for key in ("bucket", "grid_length", "grid_top", "beyond", "severity_mean", "severity_mean_grid",
                    "severity_mean_to_top", "mean", "mean_grid", "cv", "cv_grid"):
            assert key in d, (terms, key)
        assert abs(d["severity_mean_grid"] / d["severity_mean_to_top"] - 1) <= pricing.MEAN_TOLERANCE
    df = lw.price_layers(model, lw.stack([1e6, 2e6, 5e6], start=1e6), lw.WangTransform(0.3))
    assert {"grid_error", "discretisation_error", "warning"} <= set(df.columns)
    assert (df["warning"] == "").all()
    sample = lw.price_layers(lw.YearLossTable(np.arange(100.0)), [lw.Layer.aggregate(10, 20)], lw.WangTransform(0.3))
    assert sample["grid_error"].iloc[0] == 0 and sample["discretisation_error"].iloc[0] == 0 and sample["warning"].iloc[0] == ""
    info = dict(map(tuple, F["LW_MODEL_INFO"](handles.freqsev_spec(lw.negative_binomial(3, 0.8), lw.lognormal(1e6, 2.0)))[1:]))
    assert info["grid bucket"] > 0 and info["probability beyond grid"] >= 0


# =========================================================================== limits on work
def test_grid_length_and_sample_size_are_bounded(monkeypatch):
    with pytest.raises(lw.InputError) as err:
        lw.FrequencySeverity(lw.poisson(2), lw.exponential(1.0), grid_length=2 * MAX_GRID_LENGTH)
    assert err.value.argument == "grid_length"
    out = F["LW_MODEL_FREQSEV"]("poisson 2", "exponential 1", None, float(2 * MAX_GRID_LENGTH))
    assert cells.parse_error(out).argument == "grid_length"
    # a tiny bucket cannot ask for an unbounded grid: the automatic length stops at 2**20
    tiny = lw.FrequencySeverity(lw.poisson(2), lw.exponential(1e6), bucket=1e-300)
    assert tiny.grid() == (1e-300, 2**20)
    assert lw.FrequencySeverity(lw.poisson(1e7), lw.exponential(1.0)).grid(0.0, 1.0)[1] <= 2**20
    with pytest.raises(lw.InputError):
        lw.poisson(1e8)  # claim counts are bounded too (at most 1e7 a year)
    monkeypatch.setattr(models, "MAX_SAMPLE_SIZE", 1000)
    for build in (lambda: lw.YearLossTable(np.ones(1001)), lambda: lw.YearEventTable(np.ones(1001), np.ones(1001))):
        with pytest.raises(lw.InputError) as err:
            build()
        assert "at most 1,000" in err.value.message
    out = F["LW_MODEL_YEARLOSS"]([[1.0]] * 1001)
    info = cells.parse_error(out)
    assert info.code == "#VALUE!" and "at most 1,000" in info.message


def test_model_info_shows_the_grid_check():
    good = dict(map(tuple, F["LW_MODEL_INFO"]("freqsev(poisson 2, lognormal 1e6 1.5)")[1:]))
    assert good["grid check"] == "within tolerance"
    assert abs(good["severity mean on the grid"] / good["severity mean to the grid top (exact)"] - 1) <= pricing.MEAN_TOLERANCE
    coarse = dict(map(tuple, F["LW_MODEL_INFO"]("freqsev(poisson 2, exponential 1e6, bucket=1e6, method=rounding)")[1:]))
    assert "differs from the exact" in coarse["grid check"]
