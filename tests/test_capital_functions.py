"""Portfolio cell functions (addin.capital_functions): metadata, results equal to the engine's, closed forms,
round trips, error values naming the argument, and a headless recalculation."""
from __future__ import annotations

import keyword
import math

import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.addin import capital_functions, cells, functions, handles
from layerwise.addin.functions import FUNCTIONS, describe_functions
from layerwise.engine.calibration import DEFAULT_FAMILIES
from test_functions import A1_REFERENCE, VBA_IDENTIFIER, VBA_RESERVED

F = FUNCTIONS
TABLES = {"LW_PORTFOLIO", "LW_CALIBRATION", "LW_TARGET_TOWER", "LW_IMPLIED_SPREAD", "LW_ALLOCATE_LAYERS",
          "LW_ALLOCATE_UNITS", "LW_SENSITIVITY", "LW_REINSTATEMENT_TABLE", "LW_GROSS_PREMIUM"}
VALUES = {"LW_CALIBRATE", "LW_IMPLIED_PARAMETER", "LW_REINSTATEMENT_PREMIUM"}

# A small discrete annual loss, invented: EL 12.5 below VaR_0.9 = 50 (F(20) = 0.85 < 0.9 <= F(50) = 0.95).
OUTCOMES = [0.0, 10.0, 20.0, 50.0, 100.0]
PROBS = [0.5, 0.2, 0.15, 0.1, 0.05]
# Ten equally likely simulated years of two units, invented (the engine's allocation tests work them by hand).
MOTOR = [0.0, 1.0, 0.0, 2.0, 1.0, 3.0, 2.0, 5.0, 2.0, 6.0]
PROPERTY = [0.0, 0.0, 2.0, 1.0, 2.0, 1.0, 3.0, 1.0, 4.0, 4.0]
HAND = [["motor", "property"]] + [[a, b] for a, b in zip(MOTOR, PROPERTY)]


# =========================================================================== fixtures
@pytest.fixture(scope="module")
def fs():
    ref = F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5")
    return ref, lw.FrequencySeverity(lw.poisson(2), lw.lognormal(1e6, 1.5))


@pytest.fixture(scope="module")
def scen():
    ref = F["LW_MODEL_SCENARIOS"]([[x] for x in OUTCOMES], [[p] for p in PROBS])
    return ref, lw.ScenarioTable(OUTCOMES, PROBS)


@pytest.fixture(scope="module")
def ylt():
    x = np.random.default_rng(3).lognormal(14.0, 1.0, 500)
    return F["LW_MODEL_YEARLOSS"]([[float(v)] for v in x]), lw.YearLossTable(x), x


def frame_equals(table, frame, columns=None):
    """A spilled table (header + rows) equals the engine's DataFrame, cell by cell."""
    cols = list(frame.columns) if columns is None else columns
    assert table[0] == cols
    assert len(table) == 1 + len(frame)
    for row, (_, want) in zip(table[1:], frame.iterrows()):
        for col, got in zip(cols, row):
            value_equals(got, want[col], col)


def value_equals(got, want, what=""):
    if isinstance(want, (bool, np.bool_)):
        assert got is bool(want), what
    elif isinstance(want, str):
        assert got == want, what
    elif math.isnan(want):
        assert got == "#N/A", what
    elif math.isinf(want):
        assert got == "unlimited", what
    else:
        assert got == pytest.approx(float(want), rel=1e-12, abs=1e-300), (what, got, want)


def split_warning(table):
    """(the table without its warning column, that column's entries or None when it has none)."""
    if "warning" not in table[0]:
        return table, None
    j = table[0].index("warning")
    return [r[:j] + r[j + 1:] for r in table], [r[j] for r in table[1:]]


def engine_warnings(model, layers, distortions) -> list[str]:
    """Per layer, the first grid warning price_layers gives it under any of ``distortions``."""
    out = [""] * len(layers)
    for g in distortions:
        out = [a or b for a, b in zip(out, lw.price_layers(model, layers, g)["warning"])]
    return out


def pairs(table) -> dict:
    assert table[0] == ["property", "value"]
    return {k: v for k, v in table[1:]}


# =========================================================================== metadata
def test_functions_are_published_in_the_one_registry():
    mine = capital_functions.FUNCTIONS
    assert set(mine) == TABLES | VALUES
    listed = {d["name"]: d for d in describe_functions()}
    for name, f in mine.items():
        assert F[name] is f and getattr(capital_functions, name) is f
        assert name in listed
        assert listed[name]["returns"] == ("table" if name in TABLES else "value"), name
    assert list(F) == sorted(F)  # registration keeps the function reference in name order
    assert {n for n in F if getattr(functions, n, None) is F[n]} | set(mine) == set(F)
    with pytest.raises(ValueError, match="defined twice"):
        functions.register({"LW_PREMIUM": mine["LW_PORTFOLIO"]})


def test_decorated_names_and_help_texts_fit_excel():
    listed = {d["name"]: d for d in describe_functions()}
    for name, f in capital_functions.FUNCTIONS.items():
        meta = f.__xlfunc__
        assert getattr(f, "__cell_function__", False), name
        assert meta["name"] == name and meta["category"] == functions.CATEGORY and meta["volatile"] is False
        assert meta["sub"] is False
        assert (meta["ret"]["options"].get("expand") == "table") == (name in TABLES), name
        assert VBA_IDENTIFIER.match(name) and len(name) <= 32 and name.isupper() and not A1_REFERENCE.match(name)
        d = listed[name]
        assert d["description"] and "\n" not in d["description"] and len(d["description"]) <= 255, name
        assert len(d["args"]) <= 12, name  # kept small
        seen_optional = False
        for a in d["args"]:
            assert VBA_IDENTIFIER.match(a["name"]) and a["name"].lower() not in VBA_RESERVED, (name, a["name"])
            assert not keyword.iskeyword(a["name"])
            assert a["help"] and not a["help"].startswith("Positional argument"), (name, a["name"])
            assert "\n" not in a["help"] and len(a["help"]) <= 255, (name, a["name"], len(a["help"]))
            if a["optional"]:
                seen_optional = True
                assert a["default"] is None
            else:
                assert not seen_optional, (name, a["name"])
        for a in meta["args"]:
            assert a["options"].get("err_to_str") is True, (name, a["name"])
    # tower functions read the tower the way LW_TOWER does, with the same help texts
    tower = {a["name"]: a["help"] for a in listed["LW_TOWER"]["args"]}
    for name in ("LW_TARGET_TOWER", "LW_IMPLIED_SPREAD", "LW_SENSITIVITY"):
        for a in listed[name]["args"]:
            if a["name"] in ("attachments", "limits", "shares", "basis", "reinstatements", "agg_deductibles"):
                assert a["help"] == tower[a["name"]], (name, a["name"])


# =========================================================================== the portfolio
@pytest.mark.parametrize("standard,level,g", [
    ("var", 0.99, lw.WangTransform(0.3)),
    ("TVaR", 0.95, lw.ProportionalHazard(0.7)),
    ("amount", 2e7, lw.DualPower(1.5)),
])
def test_portfolio_table_equals_engine(fs, standard, level, g):
    ref, model = fs
    want = lw.price_portfolio(model, g, lw.make_capital_standard(standard.lower(), level))
    got = pairs(F["LW_PORTFOLIO"](ref, handles.distortion_spec(g), standard, level))
    assert list(got) == ["standard", "distortion", "assets", "expected_loss", "premium", "margin", "capital",
                         "return_on_capital", "leverage", "loss_ratio", "expected_default", "grid_error"]
    for k, v in got.items():
        value_equals(v, getattr(want, k), k)
    assert F["LW_PORTFOLIO"](ref, handles.distortion_spec(g), standard, [[level]], "Premium") == pytest.approx(want.premium, rel=1e-12)
    assert F["LW_PORTFOLIO"](ref, handles.distortion_spec(g), standard, level, "roc") == pytest.approx(want.return_on_capital, rel=1e-12)


def test_cost_of_capital_closed_form(scen, fs):
    # Common practice: capital a - P earns the cost of capital i, P - EL = i (a - P), so P = (EL + i a) / (1 + i).
    # Here a = VaR_0.9 = 50 and EL = E[X ∧ 50] = 0.2*10 + 0.15*20 + 0.1*50 + 0.05*50 = 12.5.
    ref, _ = scen
    i = 0.15
    assert F["LW_CALIBRATE"](ref, i, "var", 0.9, "cost_of_capital") == pytest.approx(i, rel=1e-12)
    assert F["LW_CALIBRATE"](ref, i, "var", 0.9, "ccoc") == pytest.approx(i, rel=1e-12)
    assert F["LW_PORTFOLIO"](ref, "ccoc 0.15", "var", 0.9, "premium") == pytest.approx((12.5 + i * 50) / (1 + i), rel=1e-14)
    assert F["LW_PORTFOLIO"](ref, "ccoc 0.15", "var", 0.9, "return_on_capital") == pytest.approx(i, rel=1e-13)
    # on an FFT model too: the calibrated cost of capital is the target itself
    assert F["LW_CALIBRATE"](fs[0], 0.12, "tvar", 0.99, "ccoc") == pytest.approx(0.12, rel=1e-9)
    summary = pairs(F["LW_PORTFOLIO"](fs[0], "ccoc 0.12", "tvar", 0.99))
    el, a = summary["expected_loss"], summary["assets"]
    assert summary["premium"] == pytest.approx((el + 0.12 * a) / 1.12, rel=1e-9)


@pytest.mark.parametrize("family", DEFAULT_FAMILIES)
def test_calibrate_equals_engine_and_earns_the_target(fs, family):
    ref, model = fs
    std = lw.CapitalStandard.var(0.99)
    want = lw.calibrate_to_return(model, 0.1, std, family)
    got = F["LW_CALIBRATE"](ref, 0.1, "var", 0.99, family)
    assert got == pytest.approx(want.value, rel=1e-12)
    g = handles.distortion_spec(lw.make_distortion(family, got))
    assert F["LW_PORTFOLIO"](ref, g, "var", 0.99, "return_on_capital") == pytest.approx(0.1, rel=1e-8)


def test_calibration_table_equals_engine(fs, scen):
    ref, model = fs
    std = lw.CapitalStandard.tvar(0.98)
    table = F["LW_CALIBRATION"](ref, 0.15, "tvar", 0.98)
    frame = lw.calibrate(model, 0.15, std)
    assert table[0][3] == "distortion"
    refs = [r[3] for r in table[1:]]
    frame_equals([[c for i, c in enumerate(r) if i != 3] for r in table], frame)  # the engine's columns
    for r, (_, row) in zip(refs, frame.iterrows()):  # the reference is the calibrated distortion, ready for LW_PREMIUM
        assert handles.parse_distortion(r) == lw.make_distortion(row["family"], row["value"])
    # a subset of families, selected columns
    sub = F["LW_CALIBRATION"](ref, 0.15, "tvar", 0.98, [["ph"], ["Wang"]], "family, value")
    assert sub[0] == ["family", "value"] and [r[0] for r in sub[1:]] == ["proportional_hazard", "wang"]
    assert sub[2][1] == pytest.approx(frame.set_index("family").loc["wang", "value"], rel=1e-12)
    # a family that cannot reach the target gets its reason in note (cost of capital stops at 100 = 10,000%)
    far = {r[0]: r for r in F["LW_CALIBRATION"](scen[0], 150.0, "var", 0.9, "ph, ccoc")[1:]}
    assert far["cost_of_capital"][2] == "#N/A" and far["cost_of_capital"][3] == "" and "100" in far["cost_of_capital"][-1]
    assert far["proportional_hazard"][-1] == "" and far["proportional_hazard"][10] == pytest.approx(150.0, rel=1e-9)


def test_target_tower_equals_engine(fs):
    ref, model = fs
    layers = [lw.Layer.occurrence(0.0, 1e6, share=0.5), lw.Layer.occurrence(1e6, 4e6, reinstatements=1, share=0.5),
              lw.Layer.occurrence(5e6, 1e7, share=0.5)]
    frame = lw.price_at_target(model, layers, 0.12, lw.CapitalStandard.var(0.99), ["proportional_hazard", "wang"])
    table = F["LW_TARGET_TOWER"](ref, 0.0, [[1e6], [4e6], [1e7]], 0.12, "var", 0.99, "ph, wang", 0.5, None,
                                 [[None], [1.0], [None]])
    frame_equals(table, frame)
    short = F["LW_TARGET_TOWER"](ref, [[0.0], [1e6]], [[1e6], [4e6]], 0.12, "var", 0.99, "wang", None, None, None,
                                 None, "distortion, value, premium")
    assert short[0] == ["distortion", "value", "premium"] and len(short) == 3
    assert short[1][1] == pytest.approx(F["LW_CALIBRATE"](ref, 0.12, "var", 0.99, "wang"), rel=1e-12)


# =========================================================================== implied from a market price
@pytest.mark.parametrize("typed,family,value", [
    ("ph 0.7", "ph", 0.7), ("wang 0.3", "wang", 0.3), ("dual 1.6", "dual_power", 1.6), ("tvar 0.4", "tvar", 0.4),
    ("ccoc 0.08", "cost_of_capital", 0.08),
])
def test_implied_parameter_round_trips_a_premium(fs, typed, family, value):
    ref, model = fs
    p = F["LW_PREMIUM"](ref, 1e6, 4e6, typed, 0.5, None, 1.0)
    assert F["LW_IMPLIED_PARAMETER"](ref, 1e6, 4e6, p, family, None, 0.5, None, 1.0) == pytest.approx(value, abs=1e-8)
    rol = F["LW_RATE_ON_LINE"](ref, 1e6, 4e6, typed, 0.5, None, 1.0)
    assert F["LW_IMPLIED_PARAMETER"](ref, 1e6, 4e6, rol, family, "rate on line", 0.5, None, 1.0) == pytest.approx(value, abs=1e-8)
    layer = lw.Layer.occurrence(1e6, 4e6, reinstatements=1, share=0.5)
    want = lw.implied_parameter(model, layer, family, premium=p)
    assert F["LW_IMPLIED_PARAMETER"](ref, 1e6, 4e6, p, family, "premium", 0.5, None, 1.0) == pytest.approx(want.value, rel=1e-12)


def test_implied_parameter_on_an_aggregate_layer(ylt):
    ref, model, _ = ylt
    p = F["LW_PREMIUM"](ref, 1e6, 3e6, "wang 0.25")
    assert F["LW_IMPLIED_PARAMETER"](ref, 1e6, 3e6, p, "wang") == pytest.approx(0.25, abs=1e-8)
    assert F["LW_IMPLIED_PARAMETER"](ref, 1e6, 3e6, [[p]], "Wang", "", "", "aggregate") == pytest.approx(0.25, abs=1e-8)


def test_implied_spread_equals_engine(fs):
    ref, model = fs
    layers = lw.stack([1e6, 4e6, 5e6])
    p = F["LW_PREMIUM"](ref, 1e6, 4e6, "wang 0.3")
    frame = lw.implied_spread(model, layers, 1, premium=p)
    table, notes = split_warning(F["LW_IMPLIED_SPREAD"](ref, 0.0, [[1e6], [4e6], [5e6]], 2, p))
    frame_equals(table, frame)
    assert [r[-1] for r in table[1:]] == [False, True, False]
    # a layer whose grid is outside the tolerances under any implied distortion says why in a warning column
    want = engine_warnings(model, layers, [lw.make_distortion(f, v) for f, v in frame.attrs["parameters"].items()])
    assert notes == (want if any(want) else None)
    rol = p / 4e6
    by_rol = F["LW_IMPLIED_SPREAD"](ref, [[0.0], [1e6], [5e6]], [[1e6], [4e6], [5e6]], 2, rol, "rol", "ph, wang",
                                    "rate_on_line")
    frame2 = lw.implied_spread(model, layers, 1, rate_on_line=rol, families=["proportional_hazard", "wang"],
                               measure="rate_on_line")
    frame_equals(split_warning(by_rol)[0], frame2)


# =========================================================================== allocation
def test_allocate_layers_equals_engine_and_adds_up(fs):
    ref, model = fs
    g, std = lw.WangTransform(0.3), lw.CapitalStandard.var(0.99)
    table = F["LW_ALLOCATE_LAYERS"](ref, "wang 0.3", "var", 0.99, [[2e6], [5e6]])
    frame = lw.allocate_to_layers(model, g, std, [2e6, 5e6])
    frame_equals(table, frame)
    body = np.array([r[3:6] for r in table[1:-1]], dtype=float)  # expected loss, premium, margin of the slices
    np.testing.assert_allclose(body.sum(axis=0), np.array(table[-1][3:6], dtype=float), rtol=1e-12)
    one = F["LW_ALLOCATE_LAYERS"](ref, "wang 0.3", "var", 0.99, None, "layer, premium")
    assert one[0] == ["layer", "premium"] and [r[0] for r in one[1:]][-1] == "total" and len(one) == 3
    assert one[-1][1] == pytest.approx(lw.price_portfolio(model, g, std).premium, rel=1e-12)


def test_allocate_units_from_a_range_of_annual_losses():
    # TVaR_0.75 with assets 10 (the largest total): motor 4.5, property 3.1, total 7.6 (worked by hand in the
    # engine's allocation tests from the atoms of the total and E[X_i | X = x]).
    table = F["LW_ALLOCATE_UNITS"](HAND, "tvar 0.75", "amount", 10.0)
    rows = {r[0]: dict(zip(table[0], r)) for r in table[1:]}
    assert list(rows) == ["motor", "property", "total"]
    assert rows["motor"]["premium"] == pytest.approx(4.5, rel=1e-13)
    assert rows["property"]["premium"] == pytest.approx(3.1, rel=1e-13)
    assert rows["total"]["premium"] == pytest.approx(7.6, rel=1e-13)
    frame = lw.allocate_to_units(pd.DataFrame({"motor": MOTOR, "property": PROPERTY}), lw.TVaRDistortion(0.75),
                                 lw.CapitalStandard.amount(10.0))
    frame_equals(table, frame)
    # the same through other range shapes: numpy (headless), names given, a generous selection, weights
    body = [r[:] for r in HAND[1:]]
    assert F["LW_ALLOCATE_UNITS"](np.array(body), "tvar 0.75", "amount", 10.0, "motor, property") == table
    generous = [r + [None] for r in HAND] + [[None, None, None]] * 3
    assert F["LW_ALLOCATE_UNITS"](np.array(generous, dtype=object), "tvar 0.75", "amount", 10.0) == table
    named = F["LW_ALLOCATE_UNITS"](HAND, "tvar 0.75", "amount", 10.0, [["a"], ["b"]])
    assert [r[0] for r in named[1:]] == ["a", "b", "total"]
    w = [[float(k)] for k in range(1, 11)]
    weighted = F["LW_ALLOCATE_UNITS"](HAND, "ph 0.6", "var", 0.8, None, w, "unit, premium, capital")
    want = lw.allocate_to_units(np.array(body), lw.ProportionalHazard(0.6), lw.CapitalStandard.var(0.8),
                                weights=np.arange(1, 11.0), names=["motor", "property"])
    frame_equals(weighted, want, ["unit", "premium", "capital"])


def test_allocate_units_from_model_references():
    u1 = F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5", 10000.0, 4096.0)
    u2 = F["LW_MODEL_FREQSEV"]("poisson 1", "pareto 2.5 1e6", 10000.0, 4096.0)
    m1 = lw.FrequencySeverity(lw.poisson(2), lw.lognormal(1e6, 1.5), 10000.0, 4096)
    m2 = lw.FrequencySeverity(lw.poisson(1), lw.pareto(2.5, 1e6), 10000.0, 4096)
    frame = lw.allocate_to_units({"cargo": m1, "hull": m2}, lw.WangTransform(0.3), lw.CapitalStandard.tvar(0.99))
    frame_equals(F["LW_ALLOCATE_UNITS"]([[u1], [u2]], "wang 0.3", "tvar", 0.99, "cargo, hull"), frame)
    assert [r[0] for r in F["LW_ALLOCATE_UNITS"]([u1, u2], "wang 0.3", "tvar", 0.99)[1:]] == ["unit 1", "unit 2", "total"]


def test_allocate_units_from_year_tables_of_the_same_years():
    rng = np.random.default_rng(5)
    a = rng.lognormal(1.0, 0.8, 200)
    years = rng.integers(1, 201, 300).astype(float)
    ev = rng.pareto(2.0, 300)
    r1 = F["LW_MODEL_YEARLOSS"]([[float(v)] for v in a])
    r2 = F["LW_MODEL_YEAREVENT"]([[y] for y in years], [[float(v)] for v in ev], 200.0)
    totals = np.bincount(years.astype(int) - 1, weights=ev, minlength=200)
    frame = lw.allocate_to_units(np.column_stack([a, totals]), lw.DualPower(1.4), lw.CapitalStandard.var(0.95),
                                 names=["ylt", "cat"])
    frame_equals(F["LW_ALLOCATE_UNITS"]([[r1, r2]], "dual 1.4", "var", 0.95, "ylt, cat"), frame)


# =========================================================================== sensitivities
def test_sensitivity_equals_engine(fs, ylt):
    ref, model = fs
    layers = [lw.Layer.occurrence(0.0, 1e6), lw.Layer.occurrence(1e6, 4e6, reinstatements=2)]
    frame = lw.price_sensitivities(model, layers, lw.WangTransform(0.3))
    frame_equals(F["LW_SENSITIVITY"](ref, 0.0, [[1e6], [4e6]], "wang 0.3", None, None, [[None], [2.0]]), frame)
    yref, ymodel, _ = ylt
    gs = {"ph 0.7": lw.ProportionalHazard(0.7), "tvar 0.5": lw.TVaRDistortion(0.5)}
    agg = lw.stack([2e6, 5e6], start=1e6, basis="aggregate")
    frame2 = lw.price_sensitivities(ymodel, agg, gs)
    frame_equals(F["LW_SENSITIVITY"](yref, 1e6, [[2e6], [5e6]], [["ph 0.7"], ["tvar 0.5"]]), frame2)
    picked = F["LW_SENSITIVITY"](yref, 1e6, [[2e6], [5e6]], "ph 0.7", None, None, None, None, "layer, d_limit")
    assert picked[0] == ["layer", "d_limit"] and len(picked) == 3


# =========================================================================== paid reinstatements
def test_reinstatement_premium_equals_engine(fs):
    ref, model = fs
    want = lw.price_with_reinstatements(model, 1e6, 4e6, [1.0, 0.5], lw.WangTransform(0.3), share=0.5)
    args = (ref, 1e6, 4e6, "wang 0.3", [[1.0], [0.5]], 0.5)
    assert F["LW_REINSTATEMENT_PREMIUM"](*args) == pytest.approx(want.upfront_premium, rel=1e-12)
    for quantity, field in [("upfront", "upfront_premium"), ("expected reinstatement", "expected_reinstatement_premium"),
                            ("total", "total_expected_premium"), ("expected_loss", "expected_loss"),
                            ("loss_ratio", "loss_ratio"), ("upfront_loss_ratio", "upfront_loss_ratio"),
                            ("rol", "rate_on_line"), ("premium_free_reinstatements", "premium_no_reinstatement_cost")]:
        assert F["LW_REINSTATEMENT_PREMIUM"](*args, quantity) == pytest.approx(getattr(want, field), rel=1e-12), quantity
    table = pairs(F["LW_REINSTATEMENT_TABLE"](*args))
    assert table["upfront_premium"] == pytest.approx(want.upfront_premium, rel=1e-12)
    assert table["premium_free_reinstatements"] == pytest.approx(want.premium_no_reinstatement_cost, rel=1e-12)
    assert table["reinstatements"] == 2.0 and table["monotone"] is True and table["method"] == "comonotonic"


def test_free_or_no_reinstatements_equal_the_layer_premium(fs):
    # With every rate 0 the upfront premium buys the whole aggregate limit (1 + n) x limit: the plain layer price.
    ref, _ = fs
    free = F["LW_REINSTATEMENT_PREMIUM"](ref, 1e6, 4e6, "ph 0.8", [[0.0], [0.0]])
    assert free == pytest.approx(F["LW_PREMIUM"](ref, 1e6, 4e6, "ph 0.8", None, None, 2.0), rel=1e-12)
    none = F["LW_REINSTATEMENT_PREMIUM"](ref, 1e6, 4e6, "ph 0.8")
    assert none == pytest.approx(F["LW_PREMIUM"](ref, 1e6, 4e6, "ph 0.8", None, None, 0.0), rel=1e-12)
    # paid reinstatements are worth something to the reinsurer: the upfront premium is lower
    assert F["LW_REINSTATEMENT_PREMIUM"](ref, 1e6, 4e6, "ph 0.8", [[1.0], [1.0]]) < free


# =========================================================================== loads
def test_gross_premium():
    assert F["LW_GROSS_PREMIUM"](100.0, 0.1, 0.15) == pytest.approx(100.0 / 0.75, rel=1e-15)
    assert F["LW_GROSS_PREMIUM"](100.0) == 100.0
    assert F["LW_GROSS_PREMIUM"]([[100.0, 50.0], [0.0, 30.0]], 0.2) == [[125.0, 62.5], [0.0, 37.5]]
    assert F["LW_GROSS_PREMIUM"]([80.0, 40.0], None, 0.2) == [[100.0], [50.0]]  # a 1-D list is a column
    np.testing.assert_allclose(np.array(F["LW_GROSS_PREMIUM"](np.array([[1.0], [2.0]]), 0.05, 0.05)),
                               lw.gross_premium(np.array([[1.0], [2.0]]), 0.05, 0.05), rtol=1e-15)


# =========================================================================== bad input -> error values
def _bad_cases(fs_ref, scen_ref, ylt_ref):
    T = [[1e6], [4e6]]
    return [
        # (function, args, code, argument)
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", "var", 1.5), "#VALUE!", "level"),
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", "var", None), "#VALUE!", "level"),
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", "amount", -5.0), "#VALUE!", "level"),
        ("LW_PORTFOLIO", (scen_ref, "wang 0.3", "var", 0.3), "#VALUE!", "level"),  # VaR 0.3 is 0: no assets
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", "median", 0.5), "#VALUE!", "standard"),
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", 99.0, 0.5), "#VALUE!", "standard"),
        ("LW_PORTFOLIO", (fs_ref, "wang", "var", 0.99), "#VALUE!", "distortion"),
        ("LW_PORTFOLIO", (fs_ref, "wang 0.3", "tvar", 0.9, "profit"), "#VALUE!", "quantity"),
        ("LW_PORTFOLIO", ("nope", "wang 0.3", "tvar", 0.9), "#VALUE!", "model"),
        ("LW_PORTFOLIO", ("yearloss#" + "0" * 24, "wang 0.3", "tvar", 0.9), "#REF!", "model"),
        ("LW_PORTFOLIO", (fs_ref, "#N/A", "tvar", 0.9), "#N/A", "distortion"),
        ("LW_CALIBRATE", (fs_ref, 0.1, "var", 0.99, "gumbel"), "#VALUE!", "family"),
        ("LW_CALIBRATE", (fs_ref, 0.1, "var", 0.99, None), "#VALUE!", "family"),
        ("LW_CALIBRATE", (fs_ref, -0.5, "var", 0.99, "wang"), "#VALUE!", "target_return"),
        ("LW_CALIBRATE", (fs_ref, "12%", "var", 0.99, "wang"), "#VALUE!", "target_return"),
        ("LW_CALIBRATE", (scen_ref, 200.0, "var", 0.9, "ccoc"), "#VALUE!", "target_return"),
        ("LW_CALIBRATE", (scen_ref, 0.1, "amount", 1000.0, "wang"), "#VALUE!", "target_return"),
        ("LW_CALIBRATE", (fs_ref, 0.1, "var", 0.0, "wang"), "#VALUE!", "level"),
        ("LW_CALIBRATION", (fs_ref, 0.1, "var", 0.99, "ph, nope"), "#VALUE!", "families"),
        ("LW_CALIBRATION", (fs_ref, 0.1, "var", 0.99, "ph, proportional hazard"), "#VALUE!", "families"),
        ("LW_CALIBRATION", (scen_ref, 0.1, "var", 0.3), "#VALUE!", "level"),
        ("LW_CALIBRATION", (fs_ref, 0.1, "var", 0.99, None, "family, profit"), "#VALUE!", "columns"),
        ("LW_CALIBRATION", (fs_ref, None, "var", 0.99), "#VALUE!", "target_return"),
        ("LW_TARGET_TOWER", (scen_ref, 0.0, [[10.0], [20.0]], 150.0, "var", 0.9), "#VALUE!", "target_return"),
        ("LW_TARGET_TOWER", (fs_ref, 0.0, [[1e6], [-1.0]], 0.1, "var", 0.99), "#VALUE!", "limits"),
        ("LW_TARGET_TOWER", (fs_ref, [[0.0], [1.0], [2.0]], T, 0.1, "var", 0.99), "#VALUE!", "attachments"),
        ("LW_TARGET_TOWER", (fs_ref, 0.0, T, 0.1, "var", 0.99, "dual, nope"), "#VALUE!", "families"),
        ("LW_TARGET_TOWER", (fs_ref, 0.0, T, 0.1, "var", 0.99, None, 1.5), "#VALUE!", "shares"),
        ("LW_TARGET_TOWER", (ylt_ref, 0.0, T, 0.1, "var", 0.99, None, None, None, 1.0), "#VALUE!", "reinstatements"),
        ("LW_TARGET_TOWER", (fs_ref, 0.0, T, 0.1, "var", 0.99, None, None, "weekly"), "#VALUE!", "basis"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 1.0, "wang"), "#VALUE!", "price"),  # below EL 4.5
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 100.0, "wang"), "#VALUE!", "price"),  # above the limit
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 2.0, "wang", "rol"), "#VALUE!", "price"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, "unlimited", 0.5, "wang", "rate_on_line"), "#VALUE!", "price"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, -1.0, "wang"), "#VALUE!", "price"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 6.0, "wang", "percent"), "#VALUE!", "quote"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 6.0, "blend"), "#VALUE!", "family"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, -10.0, 20.0, 6.0, "wang"), "#VALUE!", "attachment"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 6.0, "wang", None, 2.0), "#VALUE!", "share"),
        ("LW_IMPLIED_PARAMETER", (scen_ref, 10.0, 20.0, 6.0, "wang", None, None, "occurrence"), "#VALUE!", "basis"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 3.0, 5e5), "#VALUE!", "market_layer"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 1.5, 5e5), "#VALUE!", "market_layer"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 0.0, 5e5), "#VALUE!", "market_layer"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 1.0, 1.0), "#VALUE!", "price"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 1.0, 1.2e6, None, None, "profit"), "#VALUE!", "measure"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 1.0, 1.2e6, None, "ph, xyz"), "#VALUE!", "families"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, T, 1.0, 1.2e6, "quote"), "#VALUE!", "quote"),
        ("LW_IMPLIED_SPREAD", (fs_ref, 0.0, [[1e6], ["x"]], 1.0, 1.2e6), "#VALUE!", "limits"),
        ("LW_ALLOCATE_LAYERS", (scen_ref, "wang 0.3", "var", 0.9, [[30.0], [20.0]]), "#VALUE!", "breaks"),
        ("LW_ALLOCATE_LAYERS", (scen_ref, "wang 0.3", "var", 0.9, [[60.0]]), "#VALUE!", "breaks"),
        ("LW_ALLOCATE_LAYERS", (scen_ref, "wang 0.3", "var", 0.9, [[10.0, 20.0], [30.0, 40.0]]), "#VALUE!", "breaks"),
        ("LW_ALLOCATE_LAYERS", (scen_ref, "wang 0.3", "es", 1.0), "#VALUE!", "level"),
        ("LW_ALLOCATE_LAYERS", (scen_ref, "wang 0.3", "var", 0.9, None, "premium, x"), "#VALUE!", "columns"),
        ("LW_ALLOCATE_UNITS", ([[1.0, "x"], [2.0, 3.0]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[1.0, None], [2.0, 3.0]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[1.0, -1.0], [2.0, 3.0]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[1.0, "#DIV/0!"], [2.0, 3.0]], "wang 0.3", "var", 0.9), "#DIV/0!", "units"),
        ("LW_ALLOCATE_UNITS", ([["a", "b"]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([["a", "b"], [None, None]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[None]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[fs_ref], [ylt_ref]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([[fs_ref], [fs_ref]], "wang 0.3", "var", 0.9, None, [[1.0]]), "#VALUE!", "weights"),
        ("LW_ALLOCATE_UNITS", ([[scen_ref]], "wang 0.3", "var", 0.9), "#VALUE!", "units"),
        ("LW_ALLOCATE_UNITS", ([["yearloss#" + "0" * 24]], "wang 0.3", "var", 0.9), "#REF!", "units"),
        ("LW_ALLOCATE_UNITS", ([[fs_ref], ["#N/A"]], "wang 0.3", "var", 0.9), "#N/A", "units"),
        ("LW_ALLOCATE_UNITS", ([[1.0, 2.0], [2.0, 3.0]], "wang 0.3", "var", 0.9, "a, b, c"), "#VALUE!", "names"),
        ("LW_ALLOCATE_UNITS", ([[1.0, 2.0], [2.0, 3.0]], "wang 0.3", "var", 0.9, None, [[1.0], [2.0], [3.0]]), "#VALUE!", "weights"),
        ("LW_ALLOCATE_UNITS", ([[1.0, 2.0], [2.0, 3.0]], "wang 0.3", "var", 0.9, None, [[-1.0], [2.0]]), "#VALUE!", "weights"),
        ("LW_ALLOCATE_UNITS", ([[1.0, 2.0], [2.0, 3.0]], "wang 0.3", "quantile", 2.0), "#VALUE!", "level"),
        ("LW_ALLOCATE_UNITS", ([[1.0, 2.0], [2.0, 3.0]], "ph 2", "var", 0.9), "#VALUE!", "distortion"),
        ("LW_SENSITIVITY", (fs_ref, 0.0, [[1e6], [0.0]], "wang 0.3"), "#VALUE!", "limits"),
        ("LW_SENSITIVITY", (fs_ref, 0.0, T, [[None]]), "#VALUE!", "distortion"),
        ("LW_SENSITIVITY", (fs_ref, 0.0, T, "wang 0.3", None, None, None, [[1.0], [2.0], [3.0]]), "#VALUE!", "agg_deductibles"),
        ("LW_SENSITIVITY", (fs_ref, 0.0, T, "wang 0.3", None, None, [[0.5], [1.0]]), "#VALUE!", "reinstatements"),
        ("LW_SENSITIVITY", (fs_ref, 0.0, T, "wang 0.3", None, None, None, None, "premium, vega"), "#VALUE!", "columns"),
        ("LW_REINSTATEMENT_PREMIUM", (ylt_ref, 1.0, 2.0, "wang 0.3", 1.0), "#VALUE!", "model"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "wang 0.3", [[1.0], [20.0]]), "#VALUE!", "rates"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "wang 0.3", [[1.0], [-1.0]]), "#VALUE!", "rates"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "wang 0.3", [[1.0], [None], [1.0]]), "#VALUE!", "rates"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, "unlimited", "wang 0.3", 1.0), "#VALUE!", "limit"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, -1.0, 2e6, "wang 0.3", 1.0), "#VALUE!", "attachment"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "tvar 1", 1.0), "#VALUE!", "distortion"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "wang 0.3", 1.0, 0.0), "#VALUE!", "share"),
        ("LW_REINSTATEMENT_PREMIUM", (fs_ref, 1e6, 2e6, "wang 0.3", 1.0, None, "bonus"), "#VALUE!", "quantity"),
        ("LW_REINSTATEMENT_TABLE", (fs_ref, 1e6, 2e6, "wang 0.3", "100%"), "#VALUE!", "rates"),
        ("LW_REINSTATEMENT_TABLE", (scen_ref, 1.0, 2.0, "wang 0.3"), "#VALUE!", "model"),
        ("LW_REINSTATEMENT_TABLE", (fs_ref, 1e6, 2e6, "wang 0.3", 1.0, 1, 2), "#VALUE!", "arguments"),
        ("LW_GROSS_PREMIUM", (100.0, 0.6, 0.5), "#VALUE!", "expenses"),
        ("LW_GROSS_PREMIUM", (100.0, 1.0), "#VALUE!", "brokerage"),
        ("LW_GROSS_PREMIUM", (100.0, None, -0.1), "#VALUE!", "expenses"),
        ("LW_GROSS_PREMIUM", (-1.0,), "#VALUE!", "technical"),
        ("LW_GROSS_PREMIUM", (None,), "#VALUE!", "technical"),
        ("LW_GROSS_PREMIUM", ([[1.0, "x"]], 0.1), "#VALUE!", "technical"),
        ("LW_GROSS_PREMIUM", ("#NUM! LW_PREMIUM(result): is infinite",), "#NUM!", "technical"),
        ("LW_GROSS_PREMIUM", (1e308, 0.5), "#NUM!", "technical"),  # overflows
        ("LW_GROSS_PREMIUM", ([[1.0], [1e308]], 0.5), "#NUM!", "technical"),
    ]


def test_bad_inputs_give_error_values_naming_the_argument(fs, scen, ylt):
    cases = _bad_cases(fs[0], scen[0], ylt[0])
    assert {c[0] for c in cases} == set(capital_functions.FUNCTIONS)
    for name, args, code, argument in cases:
        out = F[name](*args)
        info = cells.parse_error(out)
        assert info is not None, (name, args, out)
        assert (info.code, info.function, info.argument) == (code, name, argument), (args, out)
        assert out.startswith(f"{code} {name}({argument}): ") and info.message, out


def test_internal_failures_are_contained(monkeypatch, fs):
    def boom(*a, **k):
        raise RuntimeError("engine exploded")

    monkeypatch.setattr(capital_functions, "price_portfolio", boom)
    out = F["LW_PORTFOLIO"](fs[0], "wang 0.3", "var", 0.99)
    assert out.startswith("#VALUE! LW_PORTFOLIO(internal): RuntimeError: engine exploded")


# =========================================================================== grid tolerances
@pytest.mark.filterwarnings("ignore::layerwise.engine.errors.GridWarning")
def test_a_coarse_grid_is_an_error_in_a_cell_and_a_warning_in_a_table():
    # as for the layer functions: a cell shows no number the engine cannot vouch for on its grid
    spec = handles.freqsev_spec(lw.poisson(2), lw.lognormal(1e6, 1.5), bucket=5e5)
    cases = [
        ("LW_PORTFOLIO", (spec, "wang 0.3", "var", 0.99, "premium")),
        ("LW_CALIBRATE", (spec, 0.1, "var", 0.99, "wang")),
        ("LW_IMPLIED_PARAMETER", (spec, 1e6, 1e6, 5e5, "wang", None, None, "aggregate")),
        ("LW_REINSTATEMENT_PREMIUM", (spec, 1e6, 1e6, "wang 0.3", 1.0)),
    ]
    for name, args in cases:
        info = cells.parse_error(F[name](*args))
        assert (info.code, info.function, info.argument) == ("#NUM!", name, "model"), name
        assert "tolerance" in info.message
    assert pairs(F["LW_PORTFOLIO"](spec, "wang 0.3", "var", 0.99))["warning"].startswith("discretisation")
    assert "discretisation" in pairs(F["LW_REINSTATEMENT_TABLE"](spec, 1e6, 1e6, "wang 0.3", 1.0))["warning"]
    assert all("tolerance" in r[-1] for r in F["LW_CALIBRATION"](spec, 0.1, "var", 0.99, "ph, wang")[1:])
    for name, args in [
        ("LW_ALLOCATE_LAYERS", (spec, "wang 0.3", "var", 0.99, 2e6, "layer, premium")),
        ("LW_SENSITIVITY", (spec, 1e6, 1e6, "wang 0.3", None, "aggregate", None, None, "premium")),
        ("LW_TARGET_TOWER", (spec, 1e6, 1e6, 0.1, "var", 0.99, "wang", None, "aggregate", None, None, "premium")),
    ]:
        table = F[name](*args)
        assert table[0][-1] == "warning" and all("tolerance" in r[-1] for r in table[1:]), name


# =========================================================================== headless recalculation
def test_portfolio_functions_in_headless_recalculation(tmp_path, scen):
    recalc = pytest.importorskip("layerwise.addin.recalc")
    openpyxl = pytest.importorskip("openpyxl")
    from openpyxl.worksheet.formula import ArrayFormula

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Sheet1"
    for i, row in enumerate(HAND, start=1):  # A1:B11, a header row of names over annual losses
        ws.cell(i, 1, row[0])
        ws.cell(i, 2, row[1])
    for i, (x, p) in enumerate(zip(OUTCOMES, PROBS), start=1):  # F1:G5
        ws.cell(i, 6, x)
        ws.cell(i, 7, p)
    ws["D1"] = "=LW_MODEL_SCENARIOS(F1:F5, G1:G5)"
    ws["D2"] = '=LW_CALIBRATE(D1, 0.15, "var", 0.9, "ccoc")'
    ws["D3"] = '=LW_PREMIUM(D1, 10, 20, "wang 0.3")'
    ws["D4"] = '=LW_IMPLIED_PARAMETER(D1, 10, 20, D3, "wang")'
    ws["D5"] = "=LW_GROSS_PREMIUM(D3, 0.1, 0.15)"
    ws["D6"] = '=LW_PORTFOLIO(D1, "ccoc 0.15", "var", 0.9, "premium")'
    ws["D7"] = '=LW_PORTFOLIO(D1, "wang 0.3", "var", 1.5)'
    ws["D8"] = '=LW_DISTORTION("ccoc", D2)'
    ws["H1"] = ArrayFormula("H1:I13", '=LW_PORTFOLIO(D1, "wang 0.3", "tvar", 0.9)')
    ws["K1"] = ArrayFormula("K1:S4", '=LW_ALLOCATE_UNITS(A1:B11, "tvar 0.75", "amount", 10)')
    ws["K6"] = ArrayFormula("K6:L8", '=LW_CALIBRATION(D1, 0.15, "var", 0.9, "ph, ccoc", "family, value")')
    wb.save(tmp_path / "book.xlsx")
    run = recalc.recalculate(tmp_path / "book.xlsx", tmp_path / "priced.xlsx", functions=FUNCTIONS)
    v = {k.split("!")[1]: val for k, val in run.values.items()}

    assert v["D1"].startswith("scenarios#")
    assert v["D2"] == pytest.approx(0.15, rel=1e-12)
    assert v["D3"] == pytest.approx(F["LW_PREMIUM"](scen[0], 10.0, 20.0, "wang 0.3"), rel=1e-12)
    assert v["D4"] == pytest.approx(0.3, abs=1e-8)
    assert v["D5"] == pytest.approx(v["D3"] / 0.75, rel=1e-14)
    assert v["D6"] == pytest.approx((12.5 + 0.15 * 50) / 1.15, rel=1e-13)
    assert cells.parse_error(v["D7"]).argument == "level"
    assert handles.parse_distortion(v["D8"]) == lw.CostOfCapital(v["D2"])
    summary = F["LW_PORTFOLIO"](scen[0], "wang 0.3", "tvar", 0.9)
    for i, (k, want) in enumerate(summary, start=1):
        assert v[f"H{i}"] == k
        assert v[f"I{i}"] == (pytest.approx(want, rel=1e-12) if isinstance(want, float) else want)
    units = F["LW_ALLOCATE_UNITS"](HAND, "tvar 0.75", "amount", 10.0)
    cols = "KLMNOPQRS"
    for i, row in enumerate(units, start=1):
        for c, want in zip(cols, row):
            assert v[f"{c}{i}"] == (pytest.approx(want, rel=1e-12) if isinstance(want, float) else want), f"{c}{i}"
    assert [v["K6"], v["L6"], v["K7"], v["K8"]] == ["family", "value", "proportional_hazard", "cost_of_capital"]
    assert v["L8"] == pytest.approx(0.15, rel=1e-12)
    # the priced copy holds the cached values for other programs to show
    book = openpyxl.load_workbook(tmp_path / "priced.xlsx", data_only=True)
    assert book["Sheet1"]["D2"].value == pytest.approx(0.15, rel=1e-12)
    assert book["Sheet1"]["K3"].value == "property"
