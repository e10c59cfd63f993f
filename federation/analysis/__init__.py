"""From stored releases to the numbers a validation paper reports.

Per site: the 2×2 at the bundle's threshold, sensitivity and specificity with Wilson 95% intervals, PPV and
NPV (at the site's prevalence, and at a prevalence the coordinator states), likelihood ratios and the
diagnostic odds ratio.

Pooled (``pooled``):

- the univariate summary kept from the first version: DerSimonian–Laird random effects of logit
  sensitivity and logit specificity (tau², I², prediction intervals), with 0.5 added to every cell of a
  site that has a zero cell, and only then; a site with a suppressed cell is listed as not pooled;
- ``bivariate``: the bivariate normal REML model (Reitsma et al. 2005) of the complete tables, with HSROC
  parameters, SROC curve and AUC, confidence and prediction regions;
- ``bivariate_glmm``: the exact binomial GLMM (Chu & Cole 2006) of the complete tables;
- ``bivariate_glmm_suppression_aware``: the same GLMM with suppressed sites kept in the pool, each
  contributing the probability of the tables its release allows (the release's ``min_cell_size``,
  ``allow_zero`` and flow margins; :mod:`federation.stats.suppression`).

Further analyses, pooled where a release carries them: ``discrimination`` (AUC on the logit scale; a
summary ROC curve from a multiple-threshold model of each site's own bands), ``calibration`` (O:E on the log
scale, calibration intercept and slope), ``paired`` (differences in sensitivity, specificity and AUC between
two models), ``subgroups`` (per-level pooled logit sensitivity, specificity and AUC with a test of subgroup
difference). Every pooled result names its method, the sites pooled and the sites not pooled with the
reason. A result that cannot be estimated is ``{"status": "not estimated", "reason": ...}``, never a NaN.
Pooled agreement, margin-band error rates, likelihood ratios from the bivariate model, Deeks' test,
leave-one-site-out influence, within-site subgroup contrasts and meta-regression on site covariates come
from :mod:`federation.further_analysis` (keys listed there).

The parts: ``tables`` (releases to per-site tables), ``accuracy`` (per-site and pooled accuracy), ``sections``
(the further analyses from release sections) and ``results`` (:func:`analyze`, :func:`analyze_tables`).
"""

from __future__ import annotations

from .accuracy import _attempt as _attempt  # read by the tests of the not-estimable wording
from .accuracy import headline_pooling, pool_accuracy
from .results import analyze, analyze_tables, enrolled_without_release, release_sections
from .tables import CELLS, AnalysisError, SiteTable, choose_study, site_tables

__all__ = [
    "CELLS",
    "AnalysisError",
    "SiteTable",
    "analyze",
    "analyze_tables",
    "choose_study",
    "enrolled_without_release",
    "headline_pooling",
    "pool_accuracy",
    "release_sections",
    "site_tables",
]
