"""The bivariate model's results: HSROC parameters, SROC curve, confidence and prediction regions, the fit."""

from __future__ import annotations

from dataclasses import dataclass

from federation.stats.results import Interval
from federation.stats.serial import ResultRecord, SiteExclusion


@dataclass(frozen=True)
class HSROCParameters(ResultRecord):
    """Hierarchical SROC parameters equivalent to a bivariate fit without covariates.

    Attributes
    ----------
    threshold_theta : float
        Mean positivity threshold :math:`\\Theta`.
    accuracy_lambda : float
        Mean accuracy :math:`\\Lambda` (log diagnostic odds ratio at the symmetric point).
    shape_beta : float
        Shape (asymmetry) :math:`\\beta = \\log(\\sigma_{FPR}/\\sigma_{Se})`.
    var_threshold : float
        Between-site variance of the threshold, :math:`\\sigma^2_\\theta`.
    var_accuracy : float
        Between-site variance of accuracy, :math:`\\sigma^2_\\alpha`.
    """

    threshold_theta: float
    accuracy_lambda: float
    shape_beta: float
    var_threshold: float
    var_accuracy: float


@dataclass(frozen=True)
class SROCCurve(ResultRecord):
    """The HSROC summary ROC curve on a grid of false-positive rates, and its area.

    ``area_under_curve`` is the area under the whole curve, over false-positive rates from 0 to 1,
    integrated numerically (:func:`sroc_auc_grid` gives the coarser grid sum some published tables use).
    """

    false_positive_rate: tuple[float, ...]
    sensitivity: tuple[float, ...]
    area_under_curve: float


@dataclass(frozen=True)
class Region(ResultRecord):
    """An ellipse on the (logit FPR, logit sensitivity) scale, back-transformed, as a closed polygon."""

    kind: str
    level: float
    false_positive_rate: tuple[float, ...]
    sensitivity: tuple[float, ...]


@dataclass(frozen=True)
class BivariateFit(ResultRecord):
    """A fitted bivariate model of (logit sensitivity, logit false-positive rate) across sites.

    Attributes
    ----------
    method : str
        What was fitted, in words (model, estimator, integration).
    estimator : str
        ``"REML"``, ``"ML"`` (normal approximation) or ``"ML-AGHQ"`` (exact binomial GLMM).
    mean_logit_sensitivity, mean_logit_fpr : float
        :math:`\\hat\\mu`.
    se_logit_sensitivity, se_logit_fpr, covariance_of_means : float
        From :math:`\\widehat{\\mathrm{Var}}(\\hat\\mu)`.
    tau2_logit_sensitivity, tau2_logit_fpr : float
        Diagonal of :math:`\\hat\\Psi`.
    correlation : float or None
        Between-site correlation of logit sensitivity and logit FPR; ``None`` when a variance is 0.
    correlation_fixed : bool
        True when the correlation was not estimated but fixed (the value then is the fixed one).
    log_likelihood : float
        Maximised (restricted) log-likelihood.
    sensitivity, specificity : Interval
        Summary point with Wald intervals back-transformed from the logit scale.
    sensitivity_prediction, specificity_prediction : Interval or None
        Marginal prediction intervals for a new site, :math:`\\hat\\mu \\pm t_{k-2}
        \\sqrt{\\hat\\tau^2 + \\mathrm{SE}^2}` (Higgins et al. 2009); ``None`` with fewer than 3 sites.
    hsroc : HSROCParameters or None
    sroc : SROCCurve or None
        ``None`` when a between-site variance is 0 (the HSROC shape is then undefined).
    confidence_region, prediction_region : Region
        Joint regions, radius :math:`\\sqrt{\\chi^2_{2}(\\mathrm{level})}` (as mada draws them);
        the prediction region uses :math:`\\hat\\Psi + \\widehat{\\mathrm{Var}}(\\hat\\mu)`.
    n_sites : int
        Number of sites pooled.
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    notes : tuple of str
        Fallbacks and boundary estimates a reader should know about.
    level : float
    """

    method: str
    estimator: str
    mean_logit_sensitivity: float
    mean_logit_fpr: float
    se_logit_sensitivity: float
    se_logit_fpr: float
    covariance_of_means: float
    tau2_logit_sensitivity: float
    tau2_logit_fpr: float
    correlation: float | None
    correlation_fixed: bool
    log_likelihood: float
    sensitivity: Interval
    specificity: Interval
    sensitivity_prediction: Interval | None
    specificity_prediction: Interval | None
    hsroc: HSROCParameters | None
    sroc: SROCCurve | None
    confidence_region: Region
    prediction_region: Region
    n_sites: int
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    notes: tuple[str, ...] = ()
    level: float = 0.95

    def summary(self) -> str:
        """A short text summary: summary point, heterogeneity, SROC AUC, sites."""
        pct = f"{100 * self.level:g}%"
        rho = "undefined" if self.correlation is None else f"{self.correlation:.3f}"
        fixed = " (fixed)" if self.correlation_fixed else ""
        lines = [
            f"Bivariate model: {self.method} (k = {self.n_sites})",
            f"  sensitivity  {self.sensitivity.estimate:.3f} ({pct} CI {self.sensitivity.ci_low:.3f} to "
            f"{self.sensitivity.ci_high:.3f})",
            f"  specificity  {self.specificity.estimate:.3f} ({pct} CI {self.specificity.ci_low:.3f} to "
            f"{self.specificity.ci_high:.3f})",
            f"  logit Se {self.mean_logit_sensitivity:.4f} (SE {self.se_logit_sensitivity:.4f}), "
            f"logit FPR {self.mean_logit_fpr:.4f} (SE {self.se_logit_fpr:.4f})",
            f"  tau^2 logit Se {self.tau2_logit_sensitivity:.4f}, logit FPR {self.tau2_logit_fpr:.4f}, "
            f"correlation {rho}{fixed}",
        ]
        if self.sroc is not None:
            lines.append(f"  area under the SROC curve (false-positive rates 0 to 1) {self.sroc.area_under_curve:.3f}")
        lines.extend(f"  not pooled: {e.site_id} ({e.reason})" for e in self.sites_not_pooled)
        lines.extend(f"  note: {note}" for note in self.notes)
        return "\n".join(lines)
