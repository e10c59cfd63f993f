r"""Bivariate random-effects meta-analysis of sensitivity and specificity, and what follows from it.

Scale: every site contributes the pair (logit sensitivity, logit false-positive rate), as in the R
package mada and in Harbord et al. (2007); specificity is reported as 1 − FPR, and the correlation of
logit sensitivity with logit *specificity* is minus the reported correlation. The model is

.. math:: y_i \sim N_2(\mu, S_i + \Psi),

with :math:`S_i` the known within-site variances (diagonal) and :math:`\Psi` the between-site
covariance matrix. From :math:`(\hat\mu, \widehat{\mathrm{Var}}(\hat\mu), \hat\Psi)` come the HSROC
parameters and SROC curve, the summary point with its confidence region, the prediction region and the
SROC AUC. The same geometry serves the exact binomial model of :mod:`federation.stats.glmm`.

The parts: ``results`` (the result records), ``geometry`` (HSROC, SROC and regions, shared with the exact
model) and ``normal_model`` (:func:`bivariate_random_effects`, :func:`reitsma`).
"""

from __future__ import annotations

from .geometry import SROC_GRID as SROC_GRID  # mada's default grid of false-positive rates
from .geometry import hsroc_parameters, sroc_auc_grid, summarise_bivariate
from .normal_model import bivariate_random_effects, reitsma
from .results import BivariateFit, HSROCParameters, Region, SROCCurve

__all__ = [
    "BivariateFit",
    "HSROCParameters",
    "Region",
    "SROCCurve",
    "bivariate_random_effects",
    "hsroc_parameters",
    "reitsma",
    "sroc_auc_grid",
    "summarise_bivariate",
]
