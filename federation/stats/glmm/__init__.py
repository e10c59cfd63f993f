r"""Exact binomial bivariate random-effects model (GLMM) for sensitivity and false-positive rate.

Per site :math:`i`, :math:`TP_i \sim \mathrm{Bin}(n_{1i}, \mathrm{expit}(\mu_1 + u_{1i}))` and
:math:`FP_i \sim \mathrm{Bin}(n_{0i}, \mathrm{expit}(\mu_2 + u_{2i}))` with
:math:`u_i \sim N_2(0, \Psi)`: the model of Chu & Cole (2006), on the (logit sensitivity, logit FPR)
scale used throughout :mod:`federation.stats.bivariate`. No continuity correction is needed. A site
with suppressed cells contributes, in place of the binomial probabilities, the probability of the
set of tables its release allows (:mod:`federation.stats.suppression`), so it stays in the pool.

The marginal likelihood of each site, :math:`\int L_i(\mu + u)\,\phi(u; \Psi)\,du`, is computed by
adaptive Gauss–Hermite quadrature (:mod:`.quadrature`, every site at once): the integrand's mode
:math:`\hat u_i` is found by damped Newton steps, the product Gauss–Hermite grid is centred there and
scaled by the curvature, and the value, gradient and Hessian in the parameters come from one pass over
those nodes. The five parameters :math:`(\mu_1, \mu_2, \log\sigma_1, \log\sigma_2,
\operatorname{atanh}\rho)` are estimated by maximum likelihood (L-BFGS-B, :mod:`.fit`); standard errors
of :math:`\hat\mu` come from the numerical Hessian of the log-likelihood. Profile likelihoods maximise
over the other parameters by Newton steps with the analytic Hessian, each started from the previous
profile point (:meth:`GlmmLikelihood.newton`).

References
----------
Chu H, Cole SR (2006). Bivariate meta-analysis of sensitivity and specificity with sparse data: a
generalized linear mixed model approach. J Clin Epidemiol 59:1331–1332. Pinheiro JC, Bates DM (1995).
Approximations to the log-likelihood function in the nonlinear mixed-effects model. J Comput Graph
Stat 4:12–35 (adaptive Gauss–Hermite quadrature). Liu Q, Pierce DA (1994). A note on Gauss–Hermite
quadrature. Biometrika 81:624–629. Hamza TH, van Houwelingen HC, Stijnen T (2008). The binomial
distribution of meta-analysis was preferred to model within-study variability. J Clin Epidemiol 61:41–51.
"""

from federation.stats.glmm.fit import (
    BOUNDS,
    PARAMETERS,
    GlmmLikelihood,
    binomial_glmm,
    glmm_accuracy,
    glmm_evidence,
    glmm_fit,
    glmm_refit_without,
    one_blas_thread,
)
from federation.stats.glmm.quadrature import marginal_log_likelihood

__all__ = [
    "BOUNDS",
    "PARAMETERS",
    "GlmmLikelihood",
    "binomial_glmm",
    "glmm_accuracy",
    "glmm_evidence",
    "glmm_fit",
    "glmm_refit_without",
    "marginal_log_likelihood",
    "one_blas_thread",
]
