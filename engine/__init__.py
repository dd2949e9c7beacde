"""layerwise engine: loss models, layer terms, distortions and spectral layer prices.

Typical use::

    import layerwise.engine as lw
    model = lw.FrequencySeverity(lw.poisson(5), lw.lognormal(mean=2e6, cv=2.5))
    tower = lw.stack([5e6, 10e6, 25e6], start=5e6)
    lw.price_layers(model, tower, lw.WangTransform(0.4))

Amounts are in the model's currency units; probabilities are annual.
"""
from .distortions import (
    Blend, CostOfCapital, Distortion, DualPower, FAMILIES, ProportionalHazard, TableDistortion,
    TVaRDistortion, WangTransform, make_distortion,
)
from .distribution import LossDistribution
from .errors import GridWarning, InputError
from .frequency import (
    Binomial, FixedCount, Frequency, NegativeBinomial, Poisson, binomial, fixed_count, make_frequency,
    negative_binomial, poisson,
)
from .layers import Layer, stack
from .models import FrequencySeverity, LossModel, ScenarioTable, YearEventTable, YearLossTable
from .pricing import COLUMNS, layer_statistics, price_layer, price_layers
from .severity import (
    Severity, exponential, from_scipy, gamma, generalized_pareto, lognormal, make_severity, pareto,
    single_pareto, weibull,
)

from .capital import CapitalStandard, PortfolioPrice, capital_layers, make_capital_standard, price_portfolio
from .calibration import (
    CalibrationResult, ImpliedResult, calibrate, calibrate_to_return, implied_parameter, implied_parameters,
    implied_spread, price_at_target,
)
from .allocation import allocate_to_layers, allocate_to_units, natural_allocation
from .sensitivity import price_sensitivities
from .reinstatements import ReinstatementPrice, price_with_reinstatements, reinstatement_factor
from .loads import gross_premium, with_gross_columns

__all__ = [name for name in dir() if not name.startswith("_")]
