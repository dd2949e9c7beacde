"""Technical to gross premium (engine.loads).

Sources are cited from memory (author, title, journal, year); every expected value is computed in the
test from the cited formula or worked by hand in the comments, never copied from a source.
"""
import numpy as np
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError
from layerwise.engine.loads import GROSS_COLUMNS


def test_gross_premium_grosses_up_for_loads_on_gross():
    # Loads as shares of gross: gross = technical / (1 - brokerage - expenses); 80 with 10% + 10% -> 100
    # (common practice, no source).
    assert lw.gross_premium(80.0, 0.1, 0.1) == pytest.approx(100.0, rel=1e-15)
    np.testing.assert_allclose(lw.gross_premium([0.0, 45.0, 90.0], brokerage=0.1), [0.0, 50.0, 100.0], rtol=1e-15)
    assert lw.gross_premium(7.0) == 7.0


def test_gross_columns_on_a_pricing_table():
    model = lw.ScenarioTable([0.0, 10.0, 40.0], [0.7, 0.2, 0.1])
    table = lw.price_layers(model, lw.stack([10.0, 20.0], start=5.0, basis="aggregate", share=0.5), lw.WangTransform(0.4))
    out = lw.with_gross_columns(table, brokerage=0.125, expenses=0.075)
    assert list(out.columns[-5:]) == GROSS_COLUMNS
    np.testing.assert_allclose(out["gross_premium"], table["premium"] / 0.8, rtol=1e-15)
    np.testing.assert_allclose(out["brokerage_amount"] + out["expense_amount"] + table["premium"], out["gross_premium"], rtol=1e-14)
    # gross loss ratio = technical loss ratio * (1 - loads), since the loads are shares of gross
    np.testing.assert_allclose(out["gross_loss_ratio"], table["loss_ratio"] * 0.8, rtol=1e-14)
    np.testing.assert_allclose(out["gross_rate_on_line"], out["gross_premium"] / (0.5 * table["limit"]), rtol=1e-15)
    assert "gross_premium" not in table.columns  # the input is not modified


@pytest.mark.parametrize(
    "call, argument",
    [
        (lambda: lw.gross_premium(10.0, 0.6, 0.4), "expenses"),
        (lambda: lw.gross_premium(10.0, -0.1, 0.0), "brokerage"),
        (lambda: lw.gross_premium(10.0, 0.1, 1.0), "expenses"),
        (lambda: lw.gross_premium(-10.0, 0.1, 0.1), "technical"),
        (lambda: lw.gross_premium(float("nan"), 0.1, 0.1), "technical"),
        (lambda: lw.with_gross_columns([1, 2], 0.1, 0.1), "table"),
        (lambda: lw.with_gross_columns(__import__("pandas").DataFrame({"premium": [1.0]}), 0.1), "table"),
    ],
)
def test_bad_inputs_name_the_argument(call, argument):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.argument == argument
