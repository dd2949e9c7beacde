"""Calibrating distortion families to a target return on capital (engine.calibration).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import numpy as np
import pytest
from scipy import stats

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# Invented demo portfolio: a compound Poisson with lognormal losses (mean 10, cv 1.5).
MODEL = lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=10.0, cv=1.5))

# Each family written out from its published formula, independently of engine.distortions:
REFERENCE_G = {
    # Wang 1995, "Insurance pricing and increased limits ratemaking by proportional hazards transforms",
    # Insurance: Mathematics and Economics 17
    "proportional_hazard": lambda s, r: s**r,
    # Wang 2000, "A class of distortion operators for pricing financial and insurance risks",
    # Journal of Risk and Insurance 67
    "wang": lambda s, lam: stats.norm.cdf(stats.norm.ppf(s) + lam),
    # dual power: g(s) = 1 - (1 - s)^m, the price of the largest of m copies (Wang 1996,
    # "Premium calculation by transforming the layer premium density", ASTIN Bulletin 26)
    "dual_power": lambda s, m: 1.0 - (1.0 - s) ** m,
    # TVaR: g(s) = min(s / (1 - p), 1) (Acerbi & Tasche 2002, "On the coherence of expected
    # shortfall", Journal of Banking & Finance 26)
    "tvar": lambda s, p: np.minimum(s / (1.0 - p), 1.0),
    # constant cost of capital: g(s) = (s + i) / (1 + i) for s > 0 (common practice, no source)
    "cost_of_capital": lambda s, i: np.where(s > 0, (s + i) / (1.0 + i), 0.0),
}


def ref_capped_price(dist, gfun, a):
    """integral_0^a g(S(t)) dt for the step survival of ``dist`` (Wang 1996, as above), piece by piece."""
    x, p = dist.values, dist.probs
    pts = np.unique(np.concatenate([[0.0, a], x[(x > 0) & (x < a)]]))
    tail = np.concatenate([np.cumsum(p[::-1])[::-1][1:], [0.0]])  # P(X > x_j)
    s = np.where(pts[:-1, None] >= x[None, :], 1, 0).sum(axis=1)  # number of atoms <= t
    surv = np.where(s > 0, tail[np.maximum(s - 1, 0)], 1.0)
    return float(np.sum(gfun(surv) * np.diff(pts)))


def test_constant_cost_of_capital_closed_form():
    # Margin = i * capital with capital = a - P gives P = (EL + i a) / (1 + i), EL = E[X ∧ a]
    # (common practice, no source); the cost-of-capital family must return i = target exactly.
    std = lw.CapitalStandard.var(0.99)
    dist = MODEL.annual()
    a = std.assets(dist)
    el = float(np.sum(dist.probs * np.minimum(dist.values, a)))  # E[X ∧ a] from the atoms
    for target in (0.05, 0.15, 0.4):
        res = lw.calibrate_to_return(MODEL, target, std, "cost_of_capital")
        assert res.value == pytest.approx(target, rel=1e-10)
        assert res.premium == pytest.approx((el + target * a) / (1 + target), rel=1e-12)
        assert res.return_on_capital == pytest.approx(target, rel=1e-10)


@pytest.mark.parametrize("std", [lw.CapitalStandard.var(0.99), lw.CapitalStandard.tvar(0.98), lw.CapitalStandard.amount(120.0)])
def test_every_family_earns_the_target(std):
    target = 0.12
    dist = MODEL.annual()
    table = lw.calibrate(MODEL, target, std)
    assert list(table["family"]) == list(REFERENCE_G)
    a = std.assets(dist)
    for row in table.itertuples():
        # premium recomputed from the published formula of g, then the return (margin / (a - P))
        prem = ref_capped_price(dist, lambda s: REFERENCE_G[row.family](s, row.value), a)
        el = ref_capped_price(dist, lambda s: s, a)
        assert prem == pytest.approx(row.premium, rel=1e-9)
        assert (prem - el) / (a - prem) == pytest.approx(target, rel=1e-8)
        assert row.assets == a


def test_tower_at_target_layers_differ_but_whole_earns_target():
    target = 0.15
    std = lw.CapitalStandard.var(0.99)
    out = lw.price_at_target(MODEL, None, target, std, breaks=[30.0, 60.0, 100.0])
    a = std.assets(MODEL.annual())
    for fam, df in out.groupby("distortion"):
        assert len(df) == 4
        assert df["limit"].sum() == pytest.approx(a, rel=1e-14)
        assert (df["part_above_assets"] == 0).all()
        # comonotonic additivity: the slices' margins and capitals add up to the portfolio's
        assert df["margin"].sum() / df["capital"].sum() == pytest.approx(target, rel=1e-9)
        roc = df["return_on_capital"].to_numpy()
        if fam == "cost_of_capital":
            # a constant cost of capital charges every slice within the support the same return
            # (common practice, no source)
            assert np.allclose(roc, target, rtol=1e-9)
        else:
            # risk-averse distortions load the bottom slices more per unit of capital
            assert roc[0] > roc[-1] * 1.5


def test_tower_flags_layers_above_assets():
    std = lw.CapitalStandard.amount(100.0)
    tower = lw.stack([50.0, 100.0], start=50.0, basis="aggregate")  # 50 xs 50 inside, 100 xs 100 above
    out = lw.price_at_target(MODEL, tower, 0.1, std, families=["wang"])
    assert list(out["part_above_assets"]) == [0.0, 1.0]
    occ = lw.price_at_target(MODEL, [lw.Layer.occurrence(10.0, 20.0)], 0.1, std, families=["wang"])
    assert np.isnan(occ["part_above_assets"].iloc[0])


def test_unreachable_target_names_argument_and_range():
    # cost of capital is bounded at 100 (10000%): at VaR assets (inside the support) the return is the
    # parameter itself, so 150 cannot be reached and the reachable top is 100.
    std = lw.CapitalStandard.var(0.99)
    with pytest.raises(InputError) as err:
        lw.calibrate_to_return(MODEL, 150.0, std, "cost_of_capital")
    assert err.value.argument == "target_return"
    assert "cost_of_capital" in err.value.message and "100" in err.value.message
    with pytest.raises(InputError) as err:
        lw.calibrate_to_return(MODEL, -0.05, std, "wang")
    assert err.value.argument == "target_return" and "from 0" in err.value.message
    skipped = lw.calibrate(MODEL, 150.0, std, ["cost_of_capital", "tvar"], errors="skip")
    assert np.isnan(skipped["value"].iloc[0]) and "reaches" in skipped["note"].iloc[0]
    assert skipped["return_on_capital"].iloc[1] == pytest.approx(150.0, rel=1e-8)


def test_zero_target_gives_the_neutral_parameter():
    # a zero return means premium = expected loss: r = 1, lam = 0, m = 1, p = 0 (common practice, no source)
    table = lw.calibrate(MODEL, 0.0, lw.CapitalStandard.var(0.99))
    assert list(table["value"]) == [1.0, 0.0, 1.0, 0.0, 0.0]


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.calibrate_to_return(MODEL, 0.1, lw.CapitalStandard.var(0.99), "gamma"), "family"),
        (lambda: lw.calibrate_to_return(MODEL, "ten", lw.CapitalStandard.var(0.99), "wang"), "target_return"),
        (lambda: lw.calibrate_to_return(MODEL, float("nan"), lw.CapitalStandard.var(0.99), "wang"), "target_return"),
        (lambda: lw.calibrate(MODEL, 0.1, "VaR 99%"), "standard"),
        (lambda: lw.calibrate(MODEL, 0.1, lw.CapitalStandard.var(0.99), errors="ignore"), "errors"),
        (lambda: lw.calibrate(MODEL, 0.1, lw.CapitalStandard.var(0.99), families=[]), "families"),
        (lambda: lw.price_at_target("model", None, 0.1, lw.CapitalStandard.var(0.99)), "model"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
