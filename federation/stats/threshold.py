r"""Choosing a threshold from the sites' released 2×2 tables at several thresholds.

:func:`pool_by_threshold` pools each threshold's tables with the headline model — the exact binomial
bivariate GLMM with withheld cells interval-censored (Chu & Cole 2006;
:func:`federation.stats.glmm.glmm_accuracy`) — giving the pooled sensitivity and specificity at every
threshold with the between-site heterogeneity (:math:`\tau` of logit sensitivity and logit specificity)
and the prediction intervals for a new site. :func:`choose_threshold` then picks the threshold that
reaches a target pooled sensitivity (the highest released threshold whose pooled sensitivity is at least
the target, so that specificity is as high as the target allows) or that maximises Youden's index
(pooled sensitivity + specificity − 1), and gives an interval for the threshold itself by the bootstrap
over sites: sites are resampled with replacement, every threshold is refitted on the resample, and the
choice is made again; the interval holds the central share ``level`` of the chosen thresholds.

A threshold chosen on the validation sites is optimistic for those same sites: the accuracy at the
chosen threshold is estimated on the data that chose it (the winner's curse), and a new site will on
average do worse. The choice is a policy decision for the programme, made with clinicians, weighing the
cost of missed cases against the burden of further assessment; this module informs it and does not make it.

References
----------
Chu H, Cole SR (2006). J Clin Epidemiol 59:1331–1332.
Youden WJ (1950). Index for rating diagnostic tests. Cancer 3:32–35.
Efron B, Tibshirani RJ (1993). An Introduction to the Bootstrap. Chapman & Hall, ch. 13 (percentile
interval).
Steinhauser S, Schumacher M, Rücker G (2016). Modelling multiple thresholds in meta-analysis of diagnostic
test accuracy studies. BMC Med Res Methodol 16:97.
Leeflang MMG, Moons KGM, Reitsma JB, Zwinderman AH (2008). Bias in sensitivity and specificity caused by
data-driven selection of optimal cutoff values. Clin Chem 54:729–737.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from federation.stats.bivariate import BivariateFit
from federation.stats.glmm import binomial_glmm
from federation.stats.proportions import _check_level
from federation.stats.results import Interval
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.suppression import SiteEvidence, site_evidence
from federation.stats.tables import ReleasedTable

__all__ = [
    "CAUTION",
    "ThresholdAccuracy",
    "ThresholdChoice",
    "choose_threshold",
    "ordered_evidence",
    "pool_by_threshold",
]

CAUTION = (
    "A threshold chosen on these validation sites is optimistic for them: its accuracy was estimated on the "
    "data that chose it, and new sites will on average do worse. Setting the threshold is a policy decision "
    "made with clinicians, weighing missed cases against further assessments; this analysis informs it and "
    "does not make it."
)


@dataclass(frozen=True)
class ThresholdAccuracy(ResultRecord):
    """Pooled accuracy at one threshold (positive when score >= threshold).

    Attributes
    ----------
    threshold : float
    status : str
        ``"estimated"``, or ``"not estimable: <reason>"``.
    sensitivity, specificity : Interval or None
        Pooled (summary) values with their confidence intervals.
    sensitivity_prediction, specificity_prediction : Interval or None
        Prediction intervals for a new site.
    tau_logit_sensitivity, tau_logit_specificity : float or None
        Between-site standard deviations on the logit scale.
    correlation : float or None
        Between-site correlation of logit sensitivity and logit false-positive rate.
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    method : str
    notes : tuple of str
    """

    threshold: float
    status: str
    sensitivity: Interval | None
    specificity: Interval | None
    sensitivity_prediction: Interval | None
    specificity_prediction: Interval | None
    tau_logit_sensitivity: float | None
    tau_logit_specificity: float | None
    correlation: float | None
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...]
    method: str
    notes: tuple[str, ...] = ()

    @property
    def estimated(self) -> bool:
        return self.status == "estimated"

    @classmethod
    def from_fit(cls, threshold: float, fit: BivariateFit) -> ThresholdAccuracy:
        return cls(
            threshold=float(threshold),
            status="estimated",
            sensitivity=fit.sensitivity,
            specificity=fit.specificity,
            sensitivity_prediction=fit.sensitivity_prediction,
            specificity_prediction=fit.specificity_prediction,
            tau_logit_sensitivity=math.sqrt(fit.tau2_logit_sensitivity),
            tau_logit_specificity=math.sqrt(fit.tau2_logit_fpr),
            correlation=fit.correlation,
            sites_pooled=tuple(fit.sites_pooled),
            sites_not_pooled=tuple(fit.sites_not_pooled),
            method=fit.method,
            notes=tuple(fit.notes),
        )

    @classmethod
    def not_estimable(
        cls, threshold: float, reason: str, not_pooled: Sequence[SiteExclusion] = ()
    ) -> ThresholdAccuracy:
        """No pooled accuracy at ``threshold``: every estimate ``None``, ``status`` giving the reason."""
        return cls(
            threshold=float(threshold),
            status=f"not estimable: {reason}",
            sensitivity=None,
            specificity=None,
            sensitivity_prediction=None,
            specificity_prediction=None,
            tau_logit_sensitivity=None,
            tau_logit_specificity=None,
            correlation=None,
            sites_pooled=(),
            sites_not_pooled=tuple(not_pooled),
            method="exact binomial GLMM (Chu & Cole 2006)",
        )


def _check_thresholds(tables_by_threshold: Mapping[float, Sequence[ReleasedTable | SiteEvidence]]) -> list[float]:
    if not tables_by_threshold:
        raise PoolingError("no thresholds: the sites released no 2x2 tables")
    thresholds = []
    for threshold in tables_by_threshold:
        if isinstance(threshold, bool) or not isinstance(threshold, int | float) or not math.isfinite(threshold):
            raise PoolingError("thresholds must be finite numbers")
        thresholds.append(float(threshold))
    return sorted(thresholds)


def _known(table: ReleasedTable, cell: str, other: str, margin: int | None) -> int | None:
    value = getattr(table, cell)
    if value is not None:
        return value
    rest = getattr(table, other)
    return None if rest is None or margin is None else margin - rest


def ordered_evidence(
    tables_by_threshold: Mapping[float, Sequence[ReleasedTable | SiteEvidence]],
) -> tuple[dict[float, list[SiteEvidence]], dict[float, list[SiteExclusion]]]:
    """Each threshold's likelihood evidence, with withheld cells bounded by the site's other thresholds.

    Screen-positives can only fall as the threshold rises, so a site's TP (and FP) at one threshold lies
    between its released TP (FP) at the next higher and the next lower thresholds. When a site withholds both
    TP and FN at one threshold, the minimum-cell-size rule alone leaves two regions (TP small or FN small);
    the site's other thresholds usually tell which. Allowed values outside the bounds are removed from the
    evidence of :func:`federation.stats.suppression.site_evidence` (if nothing would be left, the release is
    inconsistent across thresholds and the evidence is kept as the rule alone gives it).

    An entry that is already :class:`~federation.stats.suppression.SiteEvidence` (for example the 2×2 at a
    threshold inside one of a site's ROC bands, known only to lie between the band's edges) is used as it is.

    Returns
    -------
    evidence : dict of float to list of SiteEvidence
    excluded : dict of float to list of SiteExclusion
        Sites whose table at that threshold cannot be used, with the reason.
    """
    thresholds = _check_thresholds(tables_by_threshold)
    known: dict[str, list[tuple[float, int | None, int | None]]] = {}
    for threshold in thresholds:
        for table in tables_by_threshold[threshold]:
            if isinstance(table, SiteEvidence):
                continue
            known.setdefault(table.site_id, []).append(
                (threshold, _known(table, "tp", "fn", table.positives), _known(table, "fp", "tn", table.negatives))
            )
    evidence: dict[float, list[SiteEvidence]] = {}
    excluded: dict[float, list[SiteExclusion]] = {}
    for threshold in thresholds:
        evidence[threshold], excluded[threshold] = [], []
        for table in tables_by_threshold[threshold]:
            if isinstance(table, SiteEvidence):  # already evidence (e.g. a threshold inside a site's ROC band)
                evidence[threshold].append(table)
                continue
            try:
                ev = site_evidence(table)
            except PoolingError as error:
                excluded[threshold].append(SiteExclusion(table.site_id, str(error)))
                continue
            if np.all(ev.positives == 0) and np.all(ev.negatives == 0):
                excluded[threshold].append(SiteExclusion(table.site_id, "no participants analysed"))
                continue
            if ev.censored:
                ev = _bounded(ev, threshold, known.get(table.site_id, []))
            evidence[threshold].append(ev)
    return evidence, excluded


def _bounded(ev: SiteEvidence, threshold: float, known: Sequence[tuple[float, int | None, int | None]]) -> SiteEvidence:
    bounds = []
    for column in (1, 2):
        above = [row[column] for row in known if row[0] > threshold and row[column] is not None]
        below = [row[column] for row in known if row[0] < threshold and row[column] is not None]
        bounds.append((max(above, default=0), min(below, default=np.iinfo(np.int64).max)))
    keep, tps, fps = [], [], []
    for b in range(ev.n_blocks):
        tp = ev.tp_values[b][(ev.tp_values[b] >= bounds[0][0]) & (ev.tp_values[b] <= bounds[0][1])]
        fp = ev.fp_values[b][(ev.fp_values[b] >= bounds[1][0]) & (ev.fp_values[b] <= bounds[1][1])]
        if tp.size and fp.size:
            keep.append(b)
            tps.append(tp)
            fps.append(fp)
    if not keep:
        return ev
    index = np.array(keep)
    return SiteEvidence(
        ev.site_id, ev.weights[index], ev.positives[index], ev.negatives[index], tuple(tps), tuple(fps), censored=True
    )


def pool_by_threshold(
    tables_by_threshold: Mapping[float, Sequence[ReleasedTable | SiteEvidence]], level: float = 0.95, points: int = 7
) -> tuple[ThresholdAccuracy, ...]:
    """Pooled sensitivity and specificity with heterogeneity at each threshold (bivariate GLMM per threshold).

    Parameters
    ----------
    tables_by_threshold : mapping of float to sequence of ReleasedTable
        Each threshold's released tables, one per site (withheld cells ``None``, with the release's
        minimum cell size so that they are interval-censored, and bounded by the site's other thresholds:
        :func:`ordered_evidence`).
    level : float, default 0.95
    points : int, default 7
        Gauss–Hermite points per dimension.

    Returns
    -------
    tuple of ThresholdAccuracy
        In increasing order of threshold; a threshold the model cannot fit is "not estimable" with the reason.

    References
    ----------
    Chu H, Cole SR (2006). J Clin Epidemiol 59:1331–1332. Steinhauser S, et al. (2016). BMC Med Res
    Methodol 16:97 (pooling at several thresholds).
    """
    level = _check_level(level)
    evidence, excluded = ordered_evidence(tables_by_threshold)
    results = []
    for threshold in sorted(evidence):
        given = {id(t) for t in tables_by_threshold[threshold] if isinstance(t, SiteEvidence)}
        attempts = [(evidence[threshold], list(excluded[threshold]), ())]
        if given:  # if the interval evidence defeats the model, fit the sites known exactly
            exact = [ev for ev in evidence[threshold] if id(ev) not in given]
            left_out = [
                SiteExclusion(ev.site_id, "only bounds known here (inside a merged band)")
                for ev in evidence[threshold]
                if id(ev) in given
            ]
            attempts.append(
                (
                    exact,
                    [*excluded[threshold], *left_out],
                    ("fitted without the sites known only within bounds at this threshold",),
                )
            )
        reason = ""
        for sites, left, notes in attempts:
            if len(sites) < 2:
                reason = f"the binomial GLMM needs at least 2 usable sites, got {len(sites)}"
                continue
            try:
                with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                    fit = binomial_glmm(sites, points=points, level=level, excluded=left, notes=notes)
            except ValueError as error:  # PoolingError, or no finite estimate
                reason = str(error) if isinstance(error, PoolingError) else "the model gave no finite estimate"
                continue
            results.append(ThresholdAccuracy.from_fit(threshold, fit))
            break
        else:
            results.append(ThresholdAccuracy.not_estimable(threshold, reason, excluded[threshold]))
    return tuple(results)


@dataclass(frozen=True)
class ThresholdChoice(ResultRecord):
    """The threshold a stated criterion picks, with a bootstrap interval for the threshold itself.

    Attributes
    ----------
    criterion : str
        ``"target_sensitivity"`` or ``"youden"``.
    target : float or None
        The target pooled sensitivity (for ``"target_sensitivity"``).
    status : str
        ``"estimated"`` or ``"not estimable: <reason>"``.
    threshold : float or None
        The chosen released threshold.
    ci_low, ci_high : float or None
        Bootstrap percentile interval of the chosen threshold (released thresholds; ``None`` when the
        bootstrap could not be run).
    sensitivity, specificity : Interval or None
        Pooled accuracy at the chosen threshold (optimistic for these sites: see ``caution``).
    youden : float or None
        Pooled sensitivity + specificity − 1 at the chosen threshold.
    bootstrap_share : dict of str to float
        Share of bootstrap resamples that chose each threshold (keys are the thresholds as text).
    replicates : int
        Bootstrap resamples run.
    replicates_without_choice : int
        Resamples in which no threshold met the criterion or the model could not be fitted.
    level : float
    seed : int
    method : str
    caution : str
    """

    criterion: str
    target: float | None
    status: str
    threshold: float | None
    ci_low: float | None
    ci_high: float | None
    sensitivity: Interval | None
    specificity: Interval | None
    youden: float | None
    bootstrap_share: dict[str, float]
    replicates: int
    replicates_without_choice: int
    level: float
    seed: int
    method: str
    caution: str = CAUTION

    @classmethod
    def not_estimable(
        cls, criterion: str, target: float | None, reason: str, level: float, seed: int, method: str
    ) -> ThresholdChoice:
        """No threshold chosen: every estimate ``None``, no bootstrap run, ``status`` giving the reason."""
        return cls(
            criterion=criterion,
            target=target,
            status=f"not estimable: {reason}",
            threshold=None,
            ci_low=None,
            ci_high=None,
            sensitivity=None,
            specificity=None,
            youden=None,
            bootstrap_share={},
            replicates=0,
            replicates_without_choice=0,
            level=level,
            seed=seed,
            method=method,
        )


def _pick(
    thresholds: Sequence[float],
    sensitivity: Sequence[float | None],
    specificity: Sequence[float | None],
    criterion: str,
    target: float | None,
) -> int | None:
    """Index of the threshold the criterion picks among those estimated (None if none qualifies)."""
    best: int | None = None
    for i, (se, sp) in enumerate(zip(sensitivity, specificity, strict=True)):
        if se is None or sp is None:
            continue
        if criterion == "target_sensitivity":
            if se >= target and (best is None or thresholds[i] > thresholds[best]):  # type: ignore[operator]
                best = i
        elif best is None or se + sp > sensitivity[best] + specificity[best]:  # type: ignore[operator]
            best = i
    return best


def _start(fit: ThresholdAccuracy) -> list[float] | None:
    if not fit.estimated:
        return None
    se, sp = fit.sensitivity.estimate, fit.specificity.estimate  # type: ignore[union-attr]
    if se is None or sp is None or not 0 < se < 1 or not 0 < sp < 1:
        return None
    return [
        math.log(se / (1 - se)),
        math.log((1 - sp) / sp),
        math.log(max(fit.tau_logit_sensitivity or 0.0, 0.01)),
        math.log(max(fit.tau_logit_specificity or 0.0, 0.01)),
        0.0,
    ]


def _search(
    thresholds: Sequence[float],
    fits: Sequence[ThresholdAccuracy | None],
    evidence: Mapping[float, Mapping[str, SiteEvidence]],
    sample: Sequence[str],
    start: int,
    criterion: str,
    target: float | None,
    points: int,
    level: float,
) -> int | None:
    """The threshold one bootstrap resample chooses, refitting only the thresholds the search visits.

    Pooled sensitivity falls as the threshold rises (the sites' counts are nested), so the highest threshold
    reaching the target is found by walking from the full-data choice; Youden's index is taken to rise to one
    peak and fall, so the walk climbs from the full-data choice to a local maximum.
    """
    cache: dict[int, tuple[float, float] | None] = {}

    def accuracy(i: int) -> tuple[float, float] | None:
        if i not in cache:
            fit = fits[i]
            # The sites the full-data fit pooled (a threshold refitted without interval evidence stays so).
            pooled = set(fit.sites_pooled) if fit is not None else set()
            resampled = [evidence[thresholds[i]][s] for s in sample if s in evidence[thresholds[i]] and s in pooled]
            cache[i] = None
            if len(resampled) >= 2 and fit is not None and fit.estimated:
                try:
                    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                        refit = binomial_glmm(resampled, points=points, start=_start(fit), level=level)
                    cache[i] = (refit.sensitivity.estimate, refit.specificity.estimate)  # type: ignore[assignment]
                except ValueError:
                    cache[i] = None
        return cache[i]

    last = len(thresholds) - 1
    if criterion == "target_sensitivity":
        i = start
        here = accuracy(i)
        if here is None:
            return None
        if here[0] >= target:  # type: ignore[operator]
            while i < last and (up := accuracy(i + 1)) is not None and up[0] >= target:  # type: ignore[operator]
                i += 1
            return i
        while i > 0:
            i -= 1
            down = accuracy(i)
            if down is None:
                return None
            if down[0] >= target:  # type: ignore[operator]
                return i
        return None
    i = start
    here = accuracy(i)
    if here is None:
        return None
    while True:
        neighbours = [j for j in (i - 1, i + 1) if 0 <= j <= last and accuracy(j) is not None]
        better = [j for j in neighbours if sum(accuracy(j)) > sum(accuracy(i))]  # type: ignore[arg-type]
        if not better:
            return i
        i = max(better, key=lambda j: sum(accuracy(j)))  # type: ignore[arg-type]


def choose_threshold(
    tables_by_threshold: Mapping[float, Sequence[ReleasedTable | SiteEvidence]],
    criterion: str = "target_sensitivity",
    target: float | None = None,
    pooled: Sequence[ThresholdAccuracy] | None = None,
    bootstrap: int = 100,
    level: float = 0.95,
    seed: int = 2026,
    points: int = 5,
) -> ThresholdChoice:
    """The threshold that meets a criterion on pooled accuracy, with a bootstrap interval over sites.

    Parameters
    ----------
    tables_by_threshold : mapping of float to sequence of ReleasedTable
        As in :func:`pool_by_threshold`; a site is identified by ``site_id`` across thresholds.
    criterion : {"target_sensitivity", "youden"}, default "target_sensitivity"
        ``"target_sensitivity"``: the highest threshold whose pooled sensitivity is at least ``target``.
        ``"youden"``: the threshold maximising pooled sensitivity + specificity − 1 (Youden 1950).
    target : float, optional
        Target pooled sensitivity in (0, 1); required for ``"target_sensitivity"``.
    pooled : sequence of ThresholdAccuracy, optional
        :func:`pool_by_threshold` of the same tables, when already computed.
    bootstrap : int, default 100
        Resamples of sites (0 skips the interval). Each refits the GLMM, starting from the full-data
        estimates, at the thresholds a walk from the full-data choice visits: pooled sensitivity falls as the
        threshold rises, and Youden's index is taken to have one peak.
    level : float, default 0.95
    seed : int, default 2026
    points : int, default 5
        Gauss–Hermite points per dimension in the bootstrap refits.

    Returns
    -------
    ThresholdChoice

    References
    ----------
    Efron B, Tibshirani RJ (1993). An Introduction to the Bootstrap, ch. 13. Youden WJ (1950). Cancer
    3:32–35. Leeflang MMG, et al. (2008). Clin Chem 54:729–737 (optimism of data-driven thresholds).
    """
    if criterion not in ("target_sensitivity", "youden"):
        raise PoolingError(f"criterion must be 'target_sensitivity' or 'youden', got {criterion!r}")
    if criterion == "target_sensitivity":
        if isinstance(target, bool) or not isinstance(target, int | float) or not 0 < target < 1:
            raise PoolingError("a target sensitivity strictly between 0 and 1 is needed")
        target = float(target)
    else:
        target = None
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int) or not 0 <= bootstrap <= 10_000:
        raise PoolingError("bootstrap must be a whole number between 0 and 10000")
    level = _check_level(level)
    thresholds = _check_thresholds(tables_by_threshold)
    if pooled is None:
        pooled = pool_by_threshold(tables_by_threshold, level)
    by_threshold = {p.threshold: p for p in pooled}
    fits = [by_threshold.get(t) for t in thresholds]
    sens = [f.sensitivity.estimate if f is not None and f.estimated else None for f in fits]  # type: ignore[union-attr]
    spec = [f.specificity.estimate if f is not None and f.estimated else None for f in fits]  # type: ignore[union-attr]
    method = (
        "exact binomial GLMM per threshold (Chu & Cole 2006); "
        + (
            f"highest threshold with pooled sensitivity >= {target:g}"
            if criterion == "target_sensitivity"
            else "threshold maximising pooled Youden's index"
        )
        + f"; percentile interval from {bootstrap} bootstrap resamples of sites (Efron & Tibshirani 1993)"
    )
    chosen = _pick(thresholds, sens, spec, criterion, target)
    if chosen is None:
        reason = (
            f"no threshold reaches a pooled sensitivity of {target:g}"
            if criterion == "target_sensitivity"
            else "no threshold could be pooled"
        )
        return ThresholdChoice.not_estimable(criterion, target, reason, level, seed, method)
    site_ids = sorted({t.site_id for tables in tables_by_threshold.values() for t in tables})
    ordered, _ = ordered_evidence(tables_by_threshold)
    evidence = {threshold: {ev.site_id: ev for ev in ordered[threshold]} for threshold in thresholds}
    rng = np.random.default_rng(seed)
    picks: list[float] = []
    without = 0
    for _ in range(bootstrap):
        sample = [site_ids[i] for i in rng.integers(0, len(site_ids), size=len(site_ids))]
        pick = _search(thresholds, fits, evidence, sample, chosen, criterion, target, points, level)
        if pick is None:
            without += 1
        else:
            picks.append(thresholds[pick])
    ci_low = ci_high = None
    share: dict[str, float] = {}
    if picks:
        alpha = (1 - level) / 2
        ci_low = float(np.quantile(picks, alpha, method="inverted_cdf"))
        ci_high = float(np.quantile(picks, 1 - alpha, method="inverted_cdf"))
        values, counts = np.unique(picks, return_counts=True)
        share = {f"{v:g}": float(c) / bootstrap for v, c in zip(values, counts, strict=True)}
    best = fits[chosen]
    assert best is not None and best.sensitivity is not None and best.specificity is not None
    return ThresholdChoice(
        criterion=criterion,
        target=target,
        status="estimated",
        threshold=thresholds[chosen],
        ci_low=ci_low,
        ci_high=ci_high,
        sensitivity=best.sensitivity,
        specificity=best.specificity,
        youden=best.sensitivity.estimate + best.specificity.estimate - 1,  # type: ignore[operator]
        bootstrap_share=share,
        replicates=bootstrap,
        replicates_without_choice=without,
        level=level,
        seed=seed,
        method=method,
    )
