"""Bad input raises InputError naming the argument and what is allowed; never a crash or a silent number.

Each row: a call, the argument the error must name, and a piece of text the
message must contain (the valid range or the rule broken).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import layerwise.engine as lw
from layerwise.engine.errors import InputError

NAN = float("nan")
_FS = lw.FrequencySeverity(lw.poisson(2.0), lw.exponential(1.0))
_LAYER = [lw.Layer.aggregate(0.0, 1.0)]
_G = lw.WangTransform(0.1)

CASES = [
    # distortions
    ("ph r 0", lambda: lw.ProportionalHazard(0.0), "r", "(0, 1]"),
    ("ph r 1.5", lambda: lw.ProportionalHazard(1.5), "r", "(0, 1]"),
    ("ph r nan", lambda: lw.ProportionalHazard(NAN), "r", "NaN"),
    ("ph r text", lambda: lw.ProportionalHazard("half"), "r", "expected a number"),
    ("ph r bool", lambda: lw.ProportionalHazard(True), "r", "expected a number"),
    ("wang negative", lambda: lw.WangTransform(-1.0), "lam", "[0, 20]"),
    ("wang inf", lambda: lw.WangTransform(math.inf), "lam", "finite"),
    ("dual power below 1", lambda: lw.DualPower(0.5), "m", "[1, 1e+06]"),
    ("tvar p 1", lambda: lw.TVaRDistortion(1.0), "p", "[0, 1)"),
    ("tvar p negative", lambda: lw.TVaRDistortion(-0.1), "p", "[0, 1)"),
    ("cost of capital negative", lambda: lw.CostOfCapital(-0.1), "roe", "[0, 100]"),
    ("blend weights sum", lambda: lw.Blend((lw.WangTransform(0.1),), (0.5,)), "weights", "sum to 1"),
    ("blend no components", lambda: lw.Blend((), ()), "components", "at least one"),
    ("blend not a distortion", lambda: lw.Blend((1.0,), (1.0,)), "components", "expected distortions"),
    ("table not concave", lambda: lw.TableDistortion((0.0, 0.5, 1.0), (0.0, 0.2, 1.0)), "g", "concave"),
    ("table ends", lambda: lw.TableDistortion((0.1, 1.0), (0.0, 1.0)), "s", "start at 0 and end at 1"),
    ("table decreasing", lambda: lw.TableDistortion((0.0, 0.5, 1.0), (0.0, 1.2, 1.0)), "g", "non-decreasing"),
    ("unknown family", lambda: lw.make_distortion("esscher", 1.0), "family", "choose one of"),
    ("family value", lambda: lw.make_distortion("wang", -3.0), "lam", "[0, 20]"),
    ("with_value", lambda: lw.WangTransform(0.3).with_value(-1.0), "lam", "[0, 20]"),
    # severities
    ("lognormal mean", lambda: lw.lognormal(mean=-1.0, cv=1.0), "mean", "(0, inf]"),
    ("lognormal cv", lambda: lw.lognormal(mean=1.0, cv=0.0), "cv", "(0, inf]"),
    ("lognormal missing cv", lambda: lw.lognormal(mean=1.0), "cv", "mean and cv"),
    ("lognormal sigma", lambda: lw.lognormal(mu=0.0, sigma=0.0), "sigma", "(0, inf]"),
    ("lognormal both forms", lambda: lw.lognormal(1.0, 1.0, mu=0.0, sigma=1.0), "mean", "not both"),
    ("pareto shape", lambda: lw.pareto(0.0, 1.0), "shape", "(0, inf]"),
    ("pareto scale", lambda: lw.pareto(2.0, -1.0), "scale", "(0, inf]"),
    ("gamma shape", lambda: lw.gamma(-1.0, 1.0), "shape", "(0, inf]"),
    ("weibull nan", lambda: lw.weibull(NAN, 1.0), "shape", "NaN"),
    ("exponential mean", lambda: lw.exponential(0.0), "mean", "(0, inf]"),
    ("generalized pareto shape", lambda: lw.generalized_pareto(-0.5, 1.0), "shape", "[0, inf]"),
    ("scipy negative support", lambda: lw.from_scipy("norm", 0.0, 1.0), "severity", "[0, inf)"),
    ("scipy unknown", lambda: lw.from_scipy("no_such_law"), "name", "not a continuous scipy.stats"),
    ("scipy bad parameter", lambda: lw.from_scipy("gamma", -1.0), "parameters", "invalid parameters"),
    ("severity by name count", lambda: lw.make_severity("pareto", 1.0), "parameters", "2 parameter(s) (shape, scale)"),
    ("severity by name extra", lambda: lw.make_severity("gamma", 1.0, 0.5, 7.0), "parameters", "(mean, cv), got 3"),
    # frequencies
    ("poisson negative", lambda: lw.poisson(-1.0), "mean", "(0, 1e+07]"),
    ("poisson too large", lambda: lw.poisson(1e9), "mean", "(0, 1e+07]"),
    ("negative binomial cv", lambda: lw.negative_binomial(4.0, 0.1), "cv", "must exceed the Poisson cv"),
    ("negative binomial both", lambda: lw.negative_binomial(4.0, 1.0, contagion=0.1), "cv", "exactly one"),
    ("negative binomial contagion", lambda: lw.negative_binomial(4.0, contagion=0.0), "contagion", "(0, 1e+06]"),
    ("binomial q", lambda: lw.binomial(10, 1.5), "q", "(0, 1]"),
    ("binomial n", lambda: lw.binomial(2.5, 0.5), "n", "whole number"),
    ("fixed count 0", lambda: lw.fixed_count(0), "n", "[1, 1e+07]"),
    ("unknown frequency", lambda: lw.make_frequency("geometric", 1.0), "frequency", "choose poisson"),
    ("frequency count", lambda: lw.make_frequency("poisson"), "parameters", "1 parameter(s)"),
    # layers
    ("attachment negative", lambda: lw.Layer.occurrence(-1.0, 1.0), "attachment", "[0, inf]"),
    ("attachment inf", lambda: lw.Layer.occurrence(math.inf, 1.0), "attachment", "finite"),
    ("limit 0", lambda: lw.Layer.occurrence(0.0, 0.0), "limit", "(0, inf]"),
    ("limit nan", lambda: lw.Layer.occurrence(0.0, NAN), "limit", "NaN"),
    ("share 0", lambda: lw.Layer.aggregate(0.0, 1.0, share=0.0), "share", "(0, 1]"),
    ("share above 1", lambda: lw.Layer.aggregate(0.0, 1.0, share=1.5), "share", "(0, 1]"),
    ("reinstatements fraction", lambda: lw.Layer.occurrence(0.0, 1.0, reinstatements=1.5), "reinstatements", "whole number"),
    ("reinstatements negative", lambda: lw.Layer.occurrence(0.0, 1.0, reinstatements=-1), "reinstatements", "[0, inf]"),
    ("reinstatements and limit", lambda: lw.Layer.occurrence(0.0, 1.0, reinstatements=1, agg_limit=3.0), "reinstatements", "not both"),
    ("reinstatements unlimited", lambda: lw.Layer.occurrence(0.0, math.inf, reinstatements=1), "reinstatements", "finite limit"),
    ("aggregate deductible", lambda: lw.Layer.occurrence(0.0, 1.0, agg_deductible=-1.0), "aggregate deductible", "[0, inf]"),
    ("aggregate limit", lambda: lw.Layer.occurrence(0.0, 1.0, agg_limit=0.0), "aggregate limit", "(0, inf]"),
    ("stack basis", lambda: lw.stack([1.0, 2.0], basis="per risk"), "basis", "'occurrence' or 'aggregate'"),
    ("stack limit", lambda: lw.stack([1.0, -2.0]), "limits", "(0, inf]"),
    ("stack start", lambda: lw.stack([1.0], start=-1.0), "start", "[0, inf]"),
    # models
    ("bucket 0", lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), bucket=0.0), "bucket", "(0, inf]"),
    ("grid length", lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), grid_length=1000), "grid_length", "power of 2"),
    ("grid too long", lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), grid_length=2**30), "grid_length", "[16, "),
    ("method", lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), method="spline"), "method", "moment, rounding"),
    ("padding", lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), padding=1), "padding", "[2, 8]"),
    ("frequency type", lambda: lw.FrequencySeverity(1, lw.exponential(1.0)), "frequency", "expected a frequency"),
    ("severity type", lambda: lw.FrequencySeverity(lw.poisson(1.0), 1), "severity", "expected a severity"),
    ("bucket not dividing limit",
     lambda: lw.FrequencySeverity(lw.poisson(1.0), lw.exponential(1.0), bucket=0.3).annual(0.0, 1.0), "bucket", "whole number"),
    ("losses negative", lambda: lw.YearLossTable([1.0, -1.0]), "losses", ">= 0"),
    ("losses nan", lambda: lw.YearLossTable([1.0, NAN]), "losses", "NaN"),
    ("losses empty", lambda: lw.YearLossTable([]), "losses", "empty"),
    ("weights length", lambda: lw.YearLossTable([1.0, 2.0], [1.0]), "weights", "one weight per year"),
    ("weights zero", lambda: lw.YearLossTable([1.0, 2.0], [0.0, 0.0]), "weights", "not all be zero"),
    ("occurrence on annual totals",
     lambda: lw.price_layers(lw.YearLossTable([1.0, 2.0]), [lw.Layer.occurrence(1.0, 1.0)], _G), "attachment", "annual totals"),
    ("scenario probabilities", lambda: lw.ScenarioTable([1.0, 2.0], [0.5, 0.6]), "probabilities", "sum to 1"),
    ("scenario lengths", lambda: lw.ScenarioTable([1.0, 2.0], [1.0]), "probabilities", "one probability per outcome"),
    ("scenario negative", lambda: lw.ScenarioTable([1.0, 2.0], [1.5, -0.5]), "probabilities", ">= 0"),
    ("year 0", lambda: lw.YearEventTable([0, 1], [1.0, 2.0]), "years", ">= 1"),
    ("year fraction", lambda: lw.YearEventTable([1.5], [1.0]), "years", "whole numbers"),
    ("n_years short", lambda: lw.YearEventTable([1, 5], [1.0, 2.0], n_years=3), "n_years", "up to year 5"),
    ("events lengths", lambda: lw.YearEventTable([1, 2], [1.0]), "years", "one year per event"),
    # pricing
    ("not a model", lambda: lw.price_layers(1, _LAYER, _G), "model", "expected a loss model"),
    ("no layers", lambda: lw.price_layers(_FS, [], _G), "layers", "empty"),
    ("not a layer", lambda: lw.price_layers(_FS, [1], _G), "layers", "expected Layer"),
    ("not a distortion", lambda: lw.price_layers(_FS, _LAYER, 0.5), "distortion", "expected a distortion"),
    ("no distortions", lambda: lw.price_layers(_FS, _LAYER, {}), "distortion", "no distortions"),
    ("table columns", lambda: lw.price_layers(_FS, pd.DataFrame({"attachment": [1.0]}), _G), "layers", "missing ['limit']"),
    ("table basis", lambda: lw.price_layers(_FS, pd.DataFrame({"attachment": [1.0], "limit": [1.0], "basis": ["per risk"]}), _G),
     "basis", "'occurrence' or 'aggregate'"),
    ("table share", lambda: lw.price_layers(_FS, pd.DataFrame({"attachment": [1.0], "limit": [1.0], "share": ["x"]}), _G),
     "share", "expected a number"),
    ("unlimited on infinite mean",
     lambda: lw.price_layers(lw.FrequencySeverity(lw.poisson(1.0), lw.pareto(0.8, 1.0)), [lw.Layer.aggregate(0.0, math.inf)], _G),
     "limit", "infinite"),
    ("statistics level", lambda: lw.layer_statistics(_FS, _LAYER, [1.0]), "levels", "[0, 1)"),
    ("statistics level nan", lambda: lw.layer_statistics(_FS, _LAYER, [NAN]), "levels", "[0, 1)"),
    # distributions
    ("quantile level", lambda: _FS.annual().quantile(1.5), "p", "[0, 1]"),
    ("tvar level", lambda: _FS.annual().tvar(1.0), "p", "[0, 1)"),
    ("atoms sum", lambda: lw.LossDistribution.from_atoms([1.0, 2.0], [0.5, 0.4]), "probabilities", "sum to 1"),
    ("atoms negative", lambda: lw.LossDistribution.from_atoms([-1.0, 2.0], [0.5, 0.5]), "values", ">= 0"),
    ("sample empty", lambda: lw.LossDistribution.from_sample([]), "losses", "empty"),
    ("scale 0", lambda: _FS.annual().scaled(0.0), "share", "positive"),
    ("annual attachment", lambda: _FS.annual(-1.0, 1.0), "attachment", "[0, inf]"),
    ("annual limit", lambda: _FS.annual(0.0, 0.0), "limit", "(0, inf]"),
]


@pytest.mark.parametrize("call, argument, text", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input_names_its_argument(call, argument, text):
    with pytest.raises(InputError) as info:
        call()
    err = info.value
    assert isinstance(err, ValueError)
    assert err.argument == argument, str(err)
    assert text in err.message, str(err)
    assert str(err).startswith(f"{argument}: ")


@pytest.mark.filterwarnings("ignore::layerwise.engine.GridWarning")
def test_extreme_but_valid_models_price_without_crashing():
    """Valid inputs at the edges of their ranges price (finite numbers, premium >= expected loss), or warn."""
    models = [
        lw.FrequencySeverity(lw.poisson(5.0), lw.lognormal(mean=1e-12, cv=2.0)),  # tiny scale
        lw.FrequencySeverity(lw.poisson(5.0), lw.lognormal(mean=1e12, cv=2.0)),  # huge scale
        lw.FrequencySeverity(lw.poisson(1e-4), lw.lognormal(mean=1.0, cv=1.0)),  # almost never a claim
        lw.FrequencySeverity(lw.poisson(1e4), lw.lognormal(mean=1.0, cv=1.0)),  # many claims
        lw.FrequencySeverity(lw.negative_binomial(5.0, contagion=100.0), lw.lognormal(mean=1.0, cv=1.0)),
        lw.FrequencySeverity(lw.poisson(2.0), lw.pareto(1.05, 10.0)),  # mean barely finite
        lw.ScenarioTable([0.0], [1.0]),  # a certain zero loss
        lw.YearLossTable([0.0, 0.0, 0.0]),
    ]
    for model in models:
        m = model.frequency.mean * model.severity.mean if isinstance(model, lw.FrequencySeverity) else model.mean
        scale = m if m > 0 else 1.0
        layers = [lw.Layer.aggregate(0.0, math.inf), lw.Layer.aggregate(scale, scale), lw.Layer.aggregate(0.0, 3.0 * scale)]
        table = lw.price_layers(model, layers, lw.WangTransform(0.3))
        assert np.all(np.isfinite(table["premium"])), model
        assert np.all(table["premium"] >= table["expected_loss"] * (1 - 1e-9)), model
        # the grid holds the exact annual mean, up to what its beyond-the-top estimate says may lie above the
        # top, and to the transform's round-off: about 1e-13 of probability per point near the grid top is kept
        # where negative round-off is cut, which for a rare claim (Poisson 1e-4: mean 1e-4) is 7e-6 relative
        assert table["expected_loss"].iloc[0] == pytest.approx(m, rel=1e-5, abs=table["grid_error"].iloc[0] + 1e-300), model
