"""Statistics for validating a frozen screening model across sites.

Single-site accuracy (:mod:`.proportions`), univariate pooling across sites (:mod:`.univariate`) and
the JSON-safe result objects they return (:mod:`.results`); bivariate pooling of sensitivity and
specificity (:mod:`.bivariate`, :mod:`.glmm`) with suppressed cells modelled (:mod:`.suppression`); the
headline model with profile-likelihood intervals and its "not estimable" checks (:mod:`.headline`);
discrimination and calibration (:mod:`.performance`); a summary ROC from each site's own score bands
(:mod:`.multiple_threshold`); what a reviewer asks for: agreement and proportions pooled (:mod:`.agreement`),
likelihood ratios from the bivariate model (:mod:`.summary_ratios`), bivariate meta-regression
(:mod:`.bivariate_regression`) with its likelihood-ratio test in the headline model
(:mod:`.headline_regression`), within-site subgroup contrasts (:mod:`.within_site`), Deeks' test
(:mod:`.funnel`) and leave-one-site-out influence (:mod:`.influence`); subgroups and paired comparisons
(:mod:`.comparison`).
"""

from federation.stats.agreement import pool_kappa, pool_proportion
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
from federation.stats.bivariate_regression import BivariateRegression, CovariateEffect, bivariate_meta_regression
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
from federation.stats.funnel import FunnelAsymmetry, deeks_funnel_test
from federation.stats.glmm import binomial_glmm, glmm_accuracy, marginal_log_likelihood
from federation.stats.headline import PREDICTION_CONVENTION, HeadlineFit, headline_accuracy
from federation.stats.headline_regression import CovariateLikelihoodRatio, headline_covariate_test
from federation.stats.influence import LeaveOneOut, OmittedSite, headline_leave_one_site_out, leave_one_site_out
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
from federation.stats.summary_ratios import SummaryRatios, summary_ratios
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
from federation.stats.within_site import WithinSiteContrast, within_site_auc_contrasts, within_site_contrasts

__all__ = [
    "PREDICTION_CONVENTION",
    "HeadlineFit",
    "headline_accuracy",
    "BivariateRegression",
    "CovariateEffect",
    "FunnelAsymmetry",
    "CovariateLikelihoodRatio",
    "LeaveOneOut",
    "OmittedSite",
    "SummaryRatios",
    "WithinSiteContrast",
    "bivariate_meta_regression",
    "deeks_funnel_test",
    "headline_covariate_test",
    "headline_leave_one_site_out",
    "leave_one_site_out",
    "pool_kappa",
    "pool_proportion",
    "summary_ratios",
    "within_site_auc_contrasts",
    "within_site_contrasts",
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
