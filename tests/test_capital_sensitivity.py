"""Sensitivities of layer premiums to layer terms and distortion parameters (engine.sensitivity).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import numpy as np
import pytest
from scipy import stats

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# Invented discrete annual loss.
OUTCOMES = np.array([0.0, 5.0, 12.0, 30.0, 55.0, 90.0])
PROBS = np.array([0.4, 0.25, 0.15, 0.1, 0.07, 0.03])
MODEL = lw.ScenarioTable(OUTCOMES, PROBS)
LAYERS = [lw.Layer.aggregate(10.0, 20.0), lw.Layer.aggregate(40.0, 40.0, share=0.5), lw.Layer.aggregate(20.0, float("inf"))]


def surv(t):
    return PROBS[OUTCOMES > t].sum()


def pieces(a, l):
    """Breakpoints of the step survival on [a, a + l] and S on each piece."""
    top = min(a + l, OUTCOMES.max())
    pts = np.unique(np.concatenate([[a, top], OUTCOMES[(OUTCOMES > a) & (OUTCOMES < top)]]))
    return np.diff(pts), np.array([surv(t) for t in pts[:-1]])


def test_term_derivatives_are_the_layer_premium_density():
    # d/dl integral_a^{a+l} g(S) = g(S(a + l)) and d/da (top fixed) = -g(S(a)): the layer premium density
    # (Wang 1996, "Premium calculation by transforming the layer premium density", ASTIN Bulletin 26);
    # right-hand values since S is right-continuous.
    g = lw.ProportionalHazard(0.6)
    out = lw.price_sensitivities(MODEL, LAYERS, g)
    for lay, row in zip(LAYERS, out.itertuples()):
        a, l, s = lay.agg_attachment, lay.agg_limit, lay.share
        g_top = surv(a + l) ** 0.6 if np.isfinite(l) else 0.0
        assert row.d_limit == pytest.approx(s * g_top, rel=1e-14, abs=1e-300)
        assert row.d_attachment_top_fixed == pytest.approx(-s * surv(a) ** 0.6, rel=1e-14)
        assert row.d_attachment == pytest.approx(s * (g_top - surv(a) ** 0.6), rel=1e-14)
        assert row.terms_method == "exact"
    # at an atom the right-hand value is used: limit 20 xs 10 ends at 30, S(30) = P(X > 30) = 0.1
    assert out["d_limit"].iloc[0] == pytest.approx(0.1**0.6, rel=1e-14)


@pytest.mark.parametrize("g, dg", [
    # d/dr s^r = s^r ln s (PH, Wang 1995, "Insurance pricing and increased limits ratemaking by proportional
    # hazards transforms", Insurance: Mathematics and Economics 17)
    (lw.ProportionalHazard(0.6), lambda s: np.where(s > 0, s**0.6 * np.log(np.where(s > 0, s, 1.0)), 0.0)),
    # d/dlam Phi(Phi^-1(s) + lam) = phi(Phi^-1(s) + lam) (Wang 2000, "A class of distortion operators for
    # pricing financial and insurance risks", Journal of Risk and Insurance 67)
    (lw.WangTransform(0.3), lambda s: np.where((s > 0) & (s < 1), stats.norm.pdf(stats.norm.ppf(s) + 0.3), 0.0)),
    # d/dm [1 - (1 - s)^m] = -(1 - s)^m ln(1 - s) (dual power; Wang 1996, as above)
    (lw.DualPower(2.5), lambda s: np.where(s < 1, -((1 - s) ** 2.5) * np.log(np.where(s < 1, 1 - s, 1.0)), 0.0)),
])
def test_parameter_derivative_against_analytic(g, dg):
    out = lw.price_sensitivities(MODEL, LAYERS[:2], g)
    for lay, row in zip(LAYERS[:2], out.itertuples()):
        w, s = pieces(lay.agg_attachment, lay.agg_limit)
        exact = lay.share * float(np.sum(w * dg(s)))
        # central difference with step 1e-5 * max(|theta|, 1): error O(1e-10) relative
        assert row.d_parameter == pytest.approx(exact, rel=1e-7)
        assert row.parameter_method == "central"
        assert row.parameter == g.parameter and row.value == g.value


def test_parameter_derivative_at_a_bound_is_one_sided():
    # PH at r = 1: backward difference; exact value integral S ln S (as above), error O(step).
    out = lw.price_sensitivities(MODEL, LAYERS[0], lw.ProportionalHazard(1.0))
    w, s = pieces(10.0, 20.0)
    assert out["parameter_method"].iloc[0] == "backward"
    assert out["d_parameter"].iloc[0] == pytest.approx(float(np.sum(w * s * np.log(s))), rel=1e-4)
    out = lw.price_sensitivities(MODEL, LAYERS[0], lw.WangTransform(0.0))
    assert out["parameter_method"].iloc[0] == "forward"
    exact = float(np.sum(w * stats.norm.pdf(stats.norm.ppf(s))))
    assert out["d_parameter"].iloc[0] == pytest.approx(exact, rel=1e-4)


def test_blend_has_no_single_parameter():
    g = lw.Blend((lw.ProportionalHazard(0.5), lw.TVaRDistortion(0.9)), (0.5, 0.5))
    out = lw.price_sensitivities(MODEL, LAYERS[0], g)
    assert np.isnan(out["d_parameter"].iloc[0]) and out["parameter_method"].iloc[0] == "none"


def test_occurrence_terms_by_forward_difference_on_events():
    # With g(s) = s the premium is E[sum over events of min(max(x - a, 0), l)] / n_years, whose right
    # derivatives count events: d/da = -#{a < x <= a + l} / n, d/dl = #{x > a + l} / n (common practice,
    # no source). Event losses are kept away from a, a + l so the forward difference is exact.
    losses = np.array([3.0, 7.5, 12.0, 18.0, 26.0, 33.0, 41.0, 4.0, 22.0, 60.0])
    years = np.array([1, 1, 2, 3, 3, 4, 5, 6, 6, 8])
    yet = lw.YearEventTable(years, losses, n_years=10)
    lay = lw.Layer.occurrence(10.0, 20.0)
    out = lw.price_sensitivities(yet, lay, lw.ProportionalHazard(1.0)).iloc[0]
    n = 10
    assert out["terms_method"] == "forward difference"
    assert out["d_attachment_top_fixed"] == pytest.approx(-np.sum(losses > 10) / n, rel=1e-9)
    assert out["d_limit"] == pytest.approx(np.sum(losses > 30) / n, rel=1e-9)
    assert out["d_attachment"] == pytest.approx(-np.sum((losses > 10) & (losses <= 30)) / n, rel=1e-9)


def test_several_distortions():
    out = lw.price_sensitivities(MODEL, LAYERS, {"ph": lw.ProportionalHazard(0.6), "wang": lw.WangTransform(0.3)})
    assert list(out["distortion"]) == ["ph"] * 3 + ["wang"] * 3


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.price_sensitivities(MODEL, LAYERS, lw.WangTransform(0.3), parameter_step=0.0), "parameter_step"),
        (lambda: lw.price_sensitivities(MODEL, LAYERS, lw.WangTransform(0.3), term_step=1.0), "term_step"),
        (lambda: lw.price_sensitivities(MODEL, LAYERS, "wang"), "distortion"),
        (lambda: lw.price_sensitivities(MODEL, LAYERS, {}), "distortion"),
        (lambda: lw.price_sensitivities(MODEL, [], lw.WangTransform(0.3)), "layers"),
        (lambda: lw.price_sensitivities(OUTCOMES, LAYERS, lw.WangTransform(0.3)), "model"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
