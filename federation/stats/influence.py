r"""Leave-one-site-out influence: the pooled summary point refitted without each site in turn.

A site whose omission moves the summary sensitivity or specificity far, or removes most of the between-site
variance, drives the result; a reviewer asks to see that. The refit is the same model as the full fit, so
the change is the site's influence on that model (Viechtbauer & Cheung 2010, "leave1out").

References
----------
Viechtbauer W, Cheung MWL (2010). Outlier and influence diagnostics for meta-analysis. Res Synth Methods
1:112–125. Reitsma JB et al. (2005). J Clin Epidemiol 58:982–990.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from federation.stats.bivariate import BivariateFit, reitsma
from federation.stats.results import Interval
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

__all__ = ["LeaveOneOut", "OmittedSite", "leave_one_site_out"]


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
        except (PoolingError, ValueError) as error:
            rows.append(OmittedSite(site, None, None, None, None, None, None, str(error)))
            continue
        rows.append(
            OmittedSite(
                site_id=site,
                sensitivity=refit.sensitivity,
                specificity=refit.specificity,
                change_logit_sensitivity=refit.mean_logit_sensitivity - full.mean_logit_sensitivity,
                # logit specificity = -logit FPR
                change_logit_specificity=-(refit.mean_logit_fpr - full.mean_logit_fpr),
                tau2_logit_sensitivity=refit.tau2_logit_sensitivity,
                tau2_logit_fpr=refit.tau2_logit_fpr,
            )
        )
    changes = [
        (max(abs(r.change_logit_sensitivity), abs(r.change_logit_specificity)), r.site_id)  # type: ignore[arg-type]
        for r in rows
        if r.change_logit_sensitivity is not None
    ]
    largest = max(changes) if changes else None
    return LeaveOneOut(
        model=full.method,
        full_sensitivity=full.sensitivity,
        full_specificity=full.specificity,
        omitted=tuple(rows),
        most_influential=None if largest is None else largest[1],
        largest_change_logit=None if largest is None else float(largest[0]),
    )
