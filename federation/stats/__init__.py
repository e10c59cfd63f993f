"""Statistics for validating a frozen screening model across sites.

Single-site accuracy (:mod:`.proportions`), univariate pooling across sites (:mod:`.univariate`) and
the JSON-safe result objects they return (:mod:`.results`); bivariate pooling of sensitivity and
specificity (:mod:`.bivariate`, :mod:`.glmm`) with suppressed cells modelled (:mod:`.suppression`);
discrimination and calibration (:mod:`.performance`); a summary ROC from each site's own score bands
(:mod:`.multiple_threshold`); subgroups and paired comparisons (:mod:`.comparison`).
"""

from federation.stats.bivariate import (
    BivariateFit,
    HSROCParameters,
    Region,
    SROCCurve,
    bivariate_random_effects,
    hsroc_parameters,
    reitsma,
    sroc_auc_grid,
)
from federation.stats.comparison import (
    JointTest,
    MetaRegression,
    ResidualHeterogeneity,
    SubgroupAnalysis,
    SubgroupEstimate,
    meta_regression,
    paired_difference,
    pool_auc_difference,
    subgroup_analysis,
)
from federation.stats.glmm import binomial_glmm, glmm_accuracy, marginal_log_likelihood
from federation.stats.multiple_threshold import (
    MultipleThresholdRoc,
    OperatingPoint,
    SiteBands,
    cumulative_points,
    multiple_threshold_roc,
)
from federation.stats.performance import (
    PooledMeasure,
    pool_auc,
    pool_calibration_intercept,
    pool_calibration_slope,
    pool_observed_expected,
)
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
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.suppression import SiteEvidence, site_evidence
from federation.stats.tables import RULES, ReleasedTable
from federation.stats.univariate import (
    LogitProportion,
    expit,
    fixed_effect,
    logit,
    logit_proportion,
    random_effects,
)

__all__ = [
    "RULES",
    "BivariateFit",
    "HSROCParameters",
    "Interval",
    "JointTest",
    "MetaRegression",
    "ResidualHeterogeneity",
    "PooledMeasure",
    "MultipleThresholdRoc",
    "OperatingPoint",
    "PoolingError",
    "Region",
    "ReleasedTable",
    "ResultRecord",
    "SROCCurve",
    "SiteBands",
    "SiteEvidence",
    "SiteExclusion",
    "SubgroupAnalysis",
    "SubgroupEstimate",
    "binomial_glmm",
    "bivariate_random_effects",
    "glmm_accuracy",
    "hsroc_parameters",
    "marginal_log_likelihood",
    "meta_regression",
    "paired_difference",
    "pool_auc",
    "pool_auc_difference",
    "pool_calibration_intercept",
    "pool_calibration_slope",
    "pool_observed_expected",
    "multiple_threshold_roc",
    "cumulative_points",
    "reitsma",
    "site_evidence",
    "sroc_auc_grid",
    "subgroup_analysis",
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
