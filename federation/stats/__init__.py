"""Statistics for validating a frozen screening model across sites.

Single-site accuracy (:mod:`.proportions`), univariate pooling across sites (:mod:`.univariate`) and
the JSON-safe result objects they return (:mod:`.results`).
"""

from federation.stats.proportions import (
    LikelihoodRatios,
    clopper_pearson,
    diagnostic_odds_ratio,
    jeffreys,
    likelihood_ratios,
    predictive_values,
    wilson,
    wilson_cc,
)
from federation.stats.results import Interval, PooledEstimate
from federation.stats.univariate import (
    LogitProportion,
    expit,
    fixed_effect,
    logit,
    logit_proportion,
    random_effects,
)

__all__ = [
    "Interval",
    "LikelihoodRatios",
    "LogitProportion",
    "PooledEstimate",
    "clopper_pearson",
    "diagnostic_odds_ratio",
    "expit",
    "fixed_effect",
    "jeffreys",
    "likelihood_ratios",
    "logit",
    "logit_proportion",
    "predictive_values",
    "random_effects",
    "wilson",
    "wilson_cc",
]
