r"""Leave-one-site-out influence: the pooled summary point refitted without each site in turn.

A site whose omission moves the summary sensitivity or specificity far, or removes most of the between-site
variance, drives the result; a reviewer asks to see that. The refit is the same model as the full fit, so
the change is the site's influence on that model (Viechtbauer & Cheung 2010, "leave1out").
:func:`headline_leave_one_site_out` refits the headline model (the censored bivariate binomial GLMM over
every site), each refit started from the full fit; :func:`leave_one_site_out` refits any model given as a
function of the tables (the bivariate normal model by default).

References
----------
Viechtbauer W, Cheung MWL (2010). Outlier and influence diagnostics for meta-analysis. Res Synth Methods
1:112–125. Reitsma JB et al. (2005). J Clin Epidemiol 58:982–990.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from federation.stats.bivariate import BivariateFit, reitsma
from federation.stats.glmm import glmm_evidence, glmm_fit, glmm_refit_without, one_blas_thread
from federation.stats.headline import _MIN_SITES, _identifiability
from federation.stats.results import Interval
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

__all__ = ["LeaveOneOut", "OmittedSite", "headline_leave_one_site_out", "leave_one_site_out"]

COULD_NOT_REFIT = "not estimable: the model could not be fitted without this site"
HEADLINE_MODEL = (
    "the headline model (bivariate binomial GLMM over every site, withheld cells censored under the rule that "
    "withheld them), each refit started from the fit to every site; Wald intervals, t on k - 2 df"
)


@dataclass(frozen=True)
class OmittedSite(ResultRecord):
    """The summary point without one site (``reason`` instead when the refit failed)."""

    site_id: str
    sensitivity: Interval | None
    specificity: Interval | None
    change_logit_sensitivity: float | None
    change_logit_specificity: float | None
    tau2_logit_sensitivity: float | None
    tau2_logit_fpr: float | None
    reason: str | None = None


@dataclass(frozen=True)
class LeaveOneOut(ResultRecord):
    """Every site's omission, and which site moves the summary point most on the logit scale."""

    model: str
    full_sensitivity: Interval
    full_specificity: Interval
    omitted: tuple[OmittedSite, ...]
    most_influential: str | None
    largest_change_logit: float | None

    def summary(self) -> str:
        lines = [f"Leave-one-site-out ({self.model})"]
        for row in self.omitted:
            if row.sensitivity is None or row.specificity is None:
                lines.append(f"  without {row.site_id}: not refitted ({row.reason})")
            else:
                lines.append(
                    f"  without {row.site_id}: sensitivity {row.sensitivity.estimate:.3f}, "
                    f"specificity {row.specificity.estimate:.3f}"
                )
        return "\n".join(lines)


def leave_one_site_out(
    tables: Sequence[ReleasedTable],
    fit: Callable[[list[ReleasedTable]], BivariateFit] = reitsma,
) -> LeaveOneOut:
    r"""Refit a bivariate model without each pooled site in turn.

    Parameters
    ----------
    tables : sequence of ReleasedTable
        The tables the full model is fitted to.
    fit : callable, default :func:`federation.stats.bivariate.reitsma`
        Tables to a :class:`BivariateFit` (for example the censored binomial model).

    Returns
    -------
    LeaveOneOut
        Per pooled site of the full fit: the refitted summary sensitivity and specificity with their
        intervals, the change in logit sensitivity and logit specificity (refit minus full), and the refitted
        between-site variances.

    Notes
    -----
    Only sites the full fit pooled are left out (leaving out a site it did not use changes nothing). A
    refit that fails (for example fewer than 2 sites remain) gives a row with its reason.
    """
    tables = list(tables)
    full = fit(tables)
    rows = []
    for site in full.sites_pooled:
        rest = [t for t in tables if t.site_id != site]
        try:
            refit = fit(rest)
        except PoolingError as error:  # written for people: names the site and the rule
            rows.append(OmittedSite(site, None, None, None, None, None, None, str(error)))
            continue
        except (ValueError, ArithmeticError):  # no internal error text reaches a person
            rows.append(OmittedSite(site, None, None, None, None, None, None, COULD_NOT_REFIT))
            continue
        rows.append(_omitted(site, refit, full))
    return _summarise(full.method, full, rows)


def headline_leave_one_site_out(tables: Sequence[ReleasedTable], level: float = 0.95, points: int = 7) -> LeaveOneOut:
    r"""Leave-one-site-out refits of the headline model (:mod:`federation.stats.headline`).

    The bivariate binomial GLMM over every site, withheld cells censored under the rule that withheld them, is
    fitted once; each refit without one site starts from that fit's estimates and from every remaining site's
    random-effect modes (:func:`federation.stats.glmm.glmm_refit_without`), so it takes a few likelihood
    evaluations instead of a fit from scratch.

    Parameters
    ----------
    tables : sequence of ReleasedTable
        Every site's released table (withheld cells as ``None``, with their ranges and rules).
    level : float, default 0.95
    points : int, default 7
        Gauss–Hermite points per dimension.

    Returns
    -------
    LeaveOneOut
        As :func:`leave_one_site_out`; summary points with Wald intervals (t on k − 2 df, k the sites left).
        A refit the data cannot support (fewer than 4 sites left, or a measure the remaining sites cannot
        estimate, as the headline says) is a row with its reason.

    Raises
    ------
    PoolingError
        When the full fit is not estimable (fewer than 4 usable sites, or a measure the headline does not
        estimate).
    """
    evidence, excluded = glmm_evidence(tables, "censor", minimum=0)
    if len(evidence) < _MIN_SITES:
        raise PoolingError(f"{len(evidence)} usable site(s); the headline model needs at least {_MIN_SITES}")
    reasons = _identifiability(evidence)
    if "sensitivity" in reasons or "specificity" in reasons:
        raise PoolingError(reasons.get("sensitivity") or reasons["specificity"])
    with one_blas_thread():
        full, likelihood, theta, _, free, _ = glmm_fit(evidence, tables, excluded, points, level)
        rows = []
        for index, ev in enumerate(evidence):
            rest = [e for i, e in enumerate(evidence) if i != index]
            rest_reasons = _identifiability(rest)
            reason = rest_reasons.get("sensitivity") or rest_reasons.get("specificity")
            if len(rest) < _MIN_SITES:
                reason = f"{len(rest)} sites left; the headline model needs at least {_MIN_SITES}"
            if reason is None:
                try:
                    refit = glmm_refit_without(likelihood, evidence, index, np.array(theta), free, level)
                except PoolingError as error:
                    reason = str(error)
                except (ValueError, ArithmeticError):  # no internal error text reaches a person
                    reason = COULD_NOT_REFIT
            if reason is not None:
                rows.append(OmittedSite(ev.site_id, None, None, None, None, None, None, reason))
                continue
            rows.append(_omitted(ev.site_id, refit, full))
    return _summarise(HEADLINE_MODEL, full, rows)


def _omitted(site: str, refit: BivariateFit, full: BivariateFit) -> OmittedSite:
    return OmittedSite(
        site_id=site,
        sensitivity=refit.sensitivity,
        specificity=refit.specificity,
        change_logit_sensitivity=refit.mean_logit_sensitivity - full.mean_logit_sensitivity,
        # logit specificity = -logit FPR
        change_logit_specificity=-(refit.mean_logit_fpr - full.mean_logit_fpr),
        tau2_logit_sensitivity=refit.tau2_logit_sensitivity,
        tau2_logit_fpr=refit.tau2_logit_fpr,
    )


def _summarise(model: str, full: BivariateFit, rows: list[OmittedSite]) -> LeaveOneOut:
    changes = [
        (max(abs(r.change_logit_sensitivity), abs(r.change_logit_specificity)), r.site_id)  # type: ignore[arg-type]
        for r in rows
        if r.change_logit_sensitivity is not None
    ]
    largest = max(changes) if changes else None
    return LeaveOneOut(
        model=model,
        full_sensitivity=full.sensitivity,
        full_specificity=full.specificity,
        omitted=tuple(rows),
        most_influential=None if largest is None else largest[1],
        largest_change_logit=None if largest is None else float(largest[0]),
    )
