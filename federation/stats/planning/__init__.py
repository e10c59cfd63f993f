r"""Planning a validation study: how wide the pooled intervals will be, and how many sites it takes.

The coordinator states what it expects — sensitivity, specificity, a range of prevalence across sites,
the between-site standard deviations :math:`\tau` of logit sensitivity and logit specificity (from a pilot
or a guess), the sites' sizes and their minimum cell size — and :func:`plan_consortium` simulates whole
consortia from that: each site's prevalence uniform over the range, its participants with the condition
binomial, its true logit sensitivity and specificity drawn from the bivariate normal random-effects
distribution, its 2×2 binomial; each simulated table is then withheld as a site would
(:func:`withhold_table`) and the consortium is pooled with the headline model, the exact binomial GLMM
with withheld cells interval-censored (:func:`federation.stats.glmm.glmm_accuracy`). The plan reports the
width of the pooled confidence intervals and of the prediction intervals (median and 10th–90th
percentiles over the simulated consortia), how often the model could be fitted, and the share of sites
whose tables come back partly withheld. :func:`sites_needed` inverts it: the fewest sites of about ``n``
participants for a pooled interval no wider than ``w``. For a single site, :func:`buderer_sample_size`
gives the closed form of Buderer (1996).

References
----------
Buderer NMF (1996). Statistical methodology: I. Incorporating the prevalence of disease into the sample
size calculation for sensitivity and specificity. Acad Emerg Med 3:895–900.
Chu H, Cole SR (2006). Bivariate meta-analysis of sensitivity and specificity with sparse data: a
generalized linear mixed model approach. J Clin Epidemiol 59:1331–1332.
Burton A, Altman DG, Royston P, Holder RL (2006). The design of simulation studies in medical statistics.
Stat Med 25:4279–4292.
Riley RD, Ensor J, Snell KIE, et al. (2021). Calculating the sample size required for developing a
clinical prediction model / external validation. Stat Med 40:4230–4251 (simulation-based planning of
validation studies).
Hundepool A, et al. (2012). Statistical Disclosure Control. Wiley, ch. 4 (primary and secondary cell
suppression).

The parts: ``scenario`` (:class:`PlanScenario`, :func:`simulate_consortium`), ``withholding``
(:func:`withhold_table`), ``simulation`` (:func:`plan_consortium`), ``consortium_size`` (:func:`sites_needed`,
:func:`scaled_width`) and ``sample_size`` (:func:`buderer_sample_size`).
"""

from __future__ import annotations

from .consortium_size import SitesNeeded, scaled_width, sites_needed
from .sample_size import buderer_sample_size
from .scenario import PlanScenario, simulate_consortium
from .simulation import PlanResult, WidthSummary, plan_consortium
from .withholding import withhold_table

__all__ = [
    "PlanScenario",
    "PlanResult",
    "SitesNeeded",
    "WidthSummary",
    "buderer_sample_size",
    "plan_consortium",
    "simulate_consortium",
    "scaled_width",
    "sites_needed",
    "withhold_table",
]
