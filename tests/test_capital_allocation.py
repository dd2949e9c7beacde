"""Allocation of premium, margin and capital to capital layers and to business units (engine.allocation).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import math

import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError

# Ten equally likely simulated years of two units, invented and small enough to work by hand.
#   year:   1  2  3  4  5  6  7  8  9  10
#   X1:     0  1  0  2  1  3  2  5  2  6
#   X2:     0  0  2  1  2  1  3  1  4  4
#   X:      0  1  2  3  3  4  5  6  6  10
HAND = pd.DataFrame({"motor": [0, 1, 0, 2, 1, 3, 2, 5, 2, 6], "property": [0, 0, 2, 1, 2, 1, 3, 1, 4, 4]}, dtype=float)


def ref_layer_price(x, p, g, a, l):
    """integral_a^{a+l} g(P(X > t)) dt, piece by piece (Wang 1996, "Premium calculation by
    transforming the layer premium density", ASTIN Bulletin 26)."""
    pts = np.unique(np.concatenate([[a, a + l], x[(x > a) & (x < a + l)]]))
    s = np.array([p[x > t].sum() for t in pts[:-1]])
    return float(np.sum(g(s) * np.diff(pts)))


def test_tvar_allocation_by_hand_with_atom_at_var():
    # TVaR at p = 0.75 (1 - p = 0.25). F(5) = 0.7 < 0.75 <= F(6) = 0.9, so VaR = 6, an atom of mass 0.2.
    # TVaR splits the atom (Acerbi & Tasche 2002, "On the coherence of expected shortfall", Journal of
    # Banking & Finance 26): TVaR = [E[X 1{X > 6}] + 6 (F(6) - 0.75)] / 0.25 = [0.1 * 10 + 6 * 0.15] / 0.25 = 7.6.
    # Its natural allocation is the same formula on each unit, E[X_i | X = 6] standing in for X_i on the
    # atom (Tsanakas & Barnett 2003, "Risk capital allocation and cooperative pricing of insurance
    # liabilities", Insurance: Mathematics and Economics 33):
    #   E[X1 | X = 6] = (5 + 2) / 2 = 3.5,  E[X2 | X = 6] = (1 + 4) / 2 = 2.5;  year 10: X1 = 6, X2 = 4
    #   motor    = [0.1 * 6 + 3.5 * 0.15] / 0.25 = 4.5
    #   property = [0.1 * 4 + 2.5 * 0.15] / 0.25 = 3.1           (4.5 + 3.1 = 7.6)
    # Assets 10 (the largest total) so nothing is capped. Expected losses are the unit means 2.2 and 1.8.
    # Assets allocated by a E[X_i / X | X >= a] = 10 * (6/10, 4/10) = (6, 4); capital = assets - premium.
    out = lw.allocate_to_units(HAND, lw.TVaRDistortion(0.75), lw.CapitalStandard.amount(10.0)).set_index("unit")
    assert out.loc["motor", "premium"] == pytest.approx(4.5, rel=1e-13)
    assert out.loc["property", "premium"] == pytest.approx(3.1, rel=1e-13)
    assert out.loc["total", "premium"] == pytest.approx(7.6, rel=1e-13)
    assert out.loc["motor", "expected_loss"] == pytest.approx(2.2, rel=1e-13)
    assert out.loc["property", "expected_loss"] == pytest.approx(1.8, rel=1e-13)
    assert out.loc["motor", "assets"] == pytest.approx(6.0, rel=1e-13)
    assert out.loc["property", "capital"] == pytest.approx(4.0 - 3.1, rel=1e-12)
    assert out.loc["total", "capital"] == pytest.approx(10.0 - 7.6, rel=1e-13)


def test_capped_allocation_by_hand():
    # Assets a = VaR_0.75 = 6; in year 10 (X = 10) each unit is paid pro rata 6/10: 3.6 and 2.4.
    # PH r = 0.5; distorted atom weights q_j = sqrt(P(X >= x_j)) - sqrt(P(X > x_j)) (Tsanakas & Barnett 2003,
    # as above) on the distinct totals 0, 1, 2, 3, 4, 5, 6, 10 with P(X >= x) = 1, .9, .8, .7, .5, .4, .3, .1.
    ge = np.array([1.0, 0.9, 0.8, 0.7, 0.5, 0.4, 0.3, 0.1])
    gt = np.append(ge[1:], 0.0)
    q = np.sqrt(ge) - np.sqrt(gt)
    # E[X_i min(1, a/X) | X = x] on those totals (x = 3: years 4, 5; x = 6: years 8, 9):
    k1 = np.array([0, 1, 0, (2 + 1) / 2, 3, 2, (5 + 2) / 2, 3.6])
    k2 = np.array([0, 0, 2, (1 + 2) / 2, 1, 3, (1 + 4) / 2, 2.4])
    # assets: 6 E[X_i / X | X >= 6] over years 8, 9, 10 = (5 + 2 + 3.6) / 3 and (1 + 4 + 2.4) / 3
    out = lw.allocate_to_units(HAND, lw.ProportionalHazard(0.5), lw.CapitalStandard.var(0.75)).set_index("unit")
    assert out.loc["motor", "premium"] == pytest.approx(q @ k1, rel=1e-13)
    assert out.loc["property", "premium"] == pytest.approx(q @ k2, rel=1e-13)
    assert out.loc["total", "premium"] == pytest.approx(q @ (k1 + k2), rel=1e-13)
    assert out.loc["motor", "expected_loss"] == pytest.approx(1.96, rel=1e-13)
    assert out.loc["motor", "assets"] == pytest.approx(10.6 / 3, rel=1e-13)
    assert out.loc["property", "assets"] == pytest.approx(7.4 / 3, rel=1e-13)
    assert out.loc["total", "assets"] == 6.0
    unit_rows = out.drop(index="total")
    for col in ("expected_loss", "premium", "margin", "assets", "capital"):
        assert unit_rows[col].sum() == pytest.approx(out.loc["total", col], rel=1e-13)


def test_weights_equal_repeated_years():
    # A year of weight 2 counts as two equal years (common practice, no source).
    w = np.ones(10)
    w[7] = 2.0
    doubled = pd.concat([HAND, HAND.iloc[[7]]], ignore_index=True)
    g, std = lw.WangTransform(0.5), lw.CapitalStandard.tvar(0.6)
    a = lw.allocate_to_units(HAND, g, std, weights=w)
    b = lw.allocate_to_units(doubled, g, std)
    np.testing.assert_allclose(a[["premium", "assets", "capital"]], b[["premium", "assets", "capital"]], rtol=1e-12)


@pytest.mark.parametrize("g, gref", [
    (lw.ProportionalHazard(0.6), lambda s: s**0.6),
    (lw.DualPower(3.0), lambda s: 1 - (1 - s) ** 3),
])
@pytest.mark.parametrize("standard", [lw.CapitalStandard.var(0.99), lw.CapitalStandard.amount(1e9)])
def test_comonotonic_units_get_their_own_price(g, gref, standard):
    # X1 = 0.3 Y and X2 = 0.7 Y move together, so comonotonic additivity gives each unit its own price:
    # rho(0.3 (Y ∧ a)) and rho(0.7 (Y ∧ a)) (Wang 1996, as above; Tsanakas & Barnett 2003, as above).
    rng = np.random.default_rng(11)
    y = rng.lognormal(1.0, 1.2, size=1500)
    table = np.column_stack([0.3 * y, 0.7 * y])
    out = lw.allocate_to_units(table, g, standard)
    a = out["assets"].iloc[-1]
    p = np.full(y.size, 1.0 / y.size)
    for i, c in enumerate((0.3, 0.7)):
        own = ref_layer_price(c * y, p, gref, 0.0, c * a)
        assert out["premium"].iloc[i] == pytest.approx(own, rel=1e-10)
    assert out["premium"].iloc[:2].sum() == pytest.approx(out["premium"].iloc[2], rel=1e-13)


def small_units():
    # Two independent invented units on a common grid (bucket 1, 128 points).
    u1 = lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(2.0), bucket=1.0, grid_length=128)
    u2 = lw.FrequencySeverity(lw.poisson(0.5), lw.exponential(4.0), bucket=1.0, grid_length=128)
    return u1, u2


def brute_force(u1, u2):
    """Joint probabilities f1[i] f2[j] of independent units, grouped on the total index i + j (numpy only)."""
    f = []
    for u in (u1, u2):
        d = u.annual()
        v = np.zeros(int(round(d.values[-1])) + 1)
        v[np.rint(d.values).astype(int)] = d.probs
        f.append(v)
    joint = np.outer(f[0], f[1])
    i, j = np.indices(joint.shape)
    tot = (i + j).ravel()
    fx = np.bincount(tot, joint.ravel())
    e1 = np.bincount(tot, (joint * i).ravel())  # E[X1 1{X = x}], bucket 1
    e2 = np.bincount(tot, (joint * j).ravel())
    return fx, e1, e2


def test_grid_units_tvar_allocation_against_brute_force():
    # TVaR_p allocation E[X_i | X >= VaR] with the atom at VaR split (Acerbi & Tasche 2002, as above),
    # computed from the joint distribution of the two grids by an outer product.
    u1, u2 = small_units()
    fx, e1, e2 = brute_force(u1, u2)
    x = np.arange(fx.size, dtype=float)
    p = 0.9
    cdf = np.cumsum(fx)
    v = int(np.searchsorted(cdf, p - 1e-12))  # lower quantile
    above = x > v
    alloc = [(e[above].sum() + e[v] / fx[v] * (cdf[v] - p)) / (1 - p) for e in (e1, e2)]
    out = lw.allocate_to_units([u1, u2], lw.TVaRDistortion(p), lw.CapitalStandard.amount(1e6))
    assert out["premium"].iloc[0] == pytest.approx(alloc[0], rel=1e-9)
    assert out["premium"].iloc[1] == pytest.approx(alloc[1], rel=1e-9)
    tvar = (np.sum(x[above] * fx[above]) + v * (cdf[v] - p)) / (1 - p)
    assert out["premium"].iloc[2] == pytest.approx(tvar, rel=1e-9)


def test_grid_units_ph_allocation_against_brute_force():
    # Natural allocation sum_j E[X_i | X = x_j] q_j (Tsanakas & Barnett 2003, as above), from brute force.
    u1, u2 = small_units()
    fx, e1, e2 = brute_force(u1, u2)
    keep = fx > 1e-15
    fx, e1, e2 = fx[keep], e1[keep], e2[keep]
    fx = fx / fx.sum()
    gt = np.concatenate([np.cumsum(fx[::-1])[::-1][1:], [0.0]])
    ge = gt + fx
    q = ge**0.7 - gt**0.7
    out = lw.allocate_to_units({"a": u1, "b": u2}, lw.ProportionalHazard(0.7), lw.CapitalStandard.amount(1e6))
    assert list(out["unit"]) == ["a", "b", "total"]
    assert out["premium"].iloc[0] == pytest.approx(np.sum(e1 / fx * q), rel=1e-8)
    assert out["premium"].iloc[1] == pytest.approx(np.sum(e2 / fx * q), rel=1e-8)


def test_grid_units_expected_value_allocation_is_the_unit_means():
    # With g(s) = s and no capping each unit is allocated its own mean (linearity of expectation).
    u1, u2 = small_units()
    out = lw.allocate_to_units([u1, u2], lw.ProportionalHazard(1.0), lw.CapitalStandard.amount(1e6))
    assert out["premium"].iloc[0] == pytest.approx(u1.annual().mean(), rel=1e-10)
    assert out["premium"].iloc[1] == pytest.approx(u2.annual().mean(), rel=1e-10)
    np.testing.assert_allclose(out["premium"], out["expected_loss"], rtol=1e-12)


def test_grid_units_add_up_at_var():
    u1, u2 = small_units()
    u3 = lw.FrequencySeverity(lw.negative_binomial(2.0, contagion=0.3), lw.pareto(3.0, 6.0), bucket=1.0, grid_length=256)
    out = lw.allocate_to_units([u1, u2, u3], lw.WangTransform(0.4), lw.CapitalStandard.var(0.995))
    units, total = out.iloc[:3], out.iloc[3]
    for col in ("expected_loss", "premium", "margin", "assets", "capital"):
        assert units[col].sum() == pytest.approx(total[col], rel=1e-12)
    # the total row is the portfolio's own price of X ∧ a (Wang 1996, as above), X = the sum of the units
    fx = np.convolve(np.convolve(*[_density(u) for u in (u1, u2)]), _density(u3))
    x = np.arange(fx.size, dtype=float)
    a = total["assets"]
    from scipy import stats
    ref = ref_layer_price(x[fx > 1e-15], fx[fx > 1e-15] / fx[fx > 1e-15].sum(),
                          lambda s: stats.norm.cdf(stats.norm.ppf(s) + 0.4), 0.0, a)
    assert total["premium"] == pytest.approx(ref, rel=1e-9)


def _density(u):
    d = u.annual()
    v = np.zeros(int(round(d.values[-1])) + 1)
    v[np.rint(d.values).astype(int)] = d.probs
    return v


def test_year_loss_tables_of_the_same_years():
    a = lw.allocate_to_units([lw.YearLossTable(HAND["motor"]), lw.YearLossTable(HAND["property"])],
                             lw.ProportionalHazard(0.5), lw.CapitalStandard.var(0.75), names=["m", "p"])
    b = lw.allocate_to_units({"m": HAND["motor"].to_numpy(), "p": HAND["property"].to_numpy()},
                             lw.ProportionalHazard(0.5), lw.CapitalStandard.var(0.75))
    c = lw.allocate_to_units(HAND.to_numpy().tolist(), lw.ProportionalHazard(0.5), lw.CapitalStandard.var(0.75), names=["m", "p"])
    for other in (b, c):
        pd.testing.assert_frame_equal(a, other, check_exact=False, rtol=1e-14)


def test_allocation_to_layers_adds_up():
    model = lw.FrequencySeverity(lw.poisson(3.0), lw.lognormal(mean=10.0, cv=1.5))
    std = lw.CapitalStandard.var(0.99)
    g = lw.ProportionalHazard(0.6)
    out = lw.allocate_to_layers(model, g, std, [30.0, 60.0])
    whole = lw.price_portfolio(model, g, std)
    slices, total = out.iloc[:-1], out.iloc[-1]
    assert total["layer"] == "total"
    for col in ("expected_loss", "premium", "margin", "capital"):
        assert slices[col].sum() == pytest.approx(getattr(whole, col), rel=1e-12)
    dist = model.annual()
    for row in slices.itertuples():
        ref = ref_layer_price(dist.values, dist.probs, lambda s: s**0.6, row.attachment, row.limit)
        assert row.premium == pytest.approx(ref, rel=1e-10)
        assert row.capital == pytest.approx(row.limit - ref, rel=1e-10)


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.allocate_to_units([lw.FrequencySeverity(lw.poisson(1), lw.exponential(2), bucket=1.0, grid_length=64),
                                       lw.FrequencySeverity(lw.poisson(1), lw.exponential(2), bucket=0.5, grid_length=64)],
                                      lw.WangTransform(0.3), lw.CapitalStandard.var(0.99)), "units"),
        # three grids of 2**21 points would need a 2**23-point joint transform: refused before any work
        (lambda: lw.allocate_to_units([lw.FrequencySeverity(lw.poisson(1), lw.exponential(2), bucket=1.0, grid_length=2**21)] * 3,
                                      lw.WangTransform(0.3), lw.CapitalStandard.var(0.99)), "units"),
        (lambda: lw.allocate_to_units(np.array([1.0, 2.0]), lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units(np.array([[1.0, -2.0]]), lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units(np.array([[1.0, math.nan]]), lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units("units", lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units([], lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units([["a", "b"]], lw.WangTransform(0.3), lw.CapitalStandard.var(0.5)), "units"),
        (lambda: lw.allocate_to_units(HAND, lw.WangTransform(0.3), lw.CapitalStandard.var(0.9), names=["x"]), "names"),
        (lambda: lw.allocate_to_units(HAND, lw.WangTransform(0.3), lw.CapitalStandard.var(0.9), weights=[1, 2]), "weights"),
        (lambda: lw.allocate_to_units({"a": [1, 2], "b": [1]}, lw.WangTransform(0.3), lw.CapitalStandard.var(0.9)), "units"),
        (lambda: lw.allocate_to_units([lw.YearLossTable([1, 2]), lw.YearLossTable([1, 2, 3])], lw.WangTransform(0.3),
                                      lw.CapitalStandard.var(0.9)), "units"),
        (lambda: lw.allocate_to_units(HAND, "wang", lw.CapitalStandard.var(0.9)), "distortion"),
        (lambda: lw.allocate_to_layers(lw.ScenarioTable([0, 10], [0.5, 0.5]), lw.WangTransform(0.3),
                                       lw.CapitalStandard.amount(10.0), [20.0]), "breaks"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
