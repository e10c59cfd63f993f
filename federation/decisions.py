"""After the study: pooled accuracy at each released threshold, the threshold a criterion picks, net benefit.

Reads only what the sites already released: the 2×2 tables at the request's thresholds (``confusion``) or,
when fewer than two thresholds were asked for, the 2×2 at each edge of the released ROC bands (the counts
of the bands above an edge are the screen-positives at that edge). A site whose bands around an edge were
withheld is left out at that edge. The statistics are in :mod:`federation.stats.threshold` and
:mod:`federation.stats.net_benefit`; this module turns stored releases into their input and their results
into JSON and tidy rows (for the report and ``federation export``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from federation.protocol import ValidationToolError
from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _edge
from federation.stats import PoolingError, ReleasedTable, SiteEvidence
from federation.stats.net_benefit import decision_curve
from federation.stats.threshold import CAUTION, choose_threshold, pool_by_threshold

from .analysis import site_tables

__all__ = [
    "DECISION_TABLES",
    "DEFAULT_BOOTSTRAP",
    "DecisionSettings",
    "decision_analysis",
    "decision_rows",
    "parse_probability_range",
    "threshold_tables",
]

DEFAULT_BOOTSTRAP = 40


@dataclass(frozen=True)
class DecisionSettings:
    """What the coordinator states for threshold choice and net benefit (``federation report``/``export``).

    ``target_sensitivity``: choose the highest threshold whose pooled sensitivity reaches it (None: maximise
    Youden's index); ``range_low``/``range_high``: threshold probabilities of the decision curve;
    ``bootstrap``: resamples of sites for the threshold's interval.
    """

    target_sensitivity: float | None = None
    range_low: float = 0.01
    range_high: float = 0.99
    bootstrap: int = 10

    def __post_init__(self) -> None:
        target = self.target_sensitivity
        if target is not None and not 0 < target < 1:
            raise ValidationToolError("--target-sensitivity: must lie strictly between 0 and 1")
        if not 0 < self.range_low <= self.range_high < 1:
            raise ValidationToolError("--threshold-probabilities: give LOW:HIGH with 0 < LOW <= HIGH < 1")
        if not 0 <= self.bootstrap <= 2000:
            raise ValidationToolError("--bootstrap: must be a whole number between 0 and 2000")


def parse_probability_range(text: str) -> tuple[float, float]:
    """``LOW:HIGH`` as two numbers (checked by :class:`DecisionSettings`)."""
    parts = text.split(":")
    try:
        low, high = (float(p) for p in parts)
    except ValueError:
        raise ValidationToolError(f"--threshold-probabilities: {text!r} is not a range LOW:HIGH") from None
    return low, high


MAX_THRESHOLDS = 8


def _band_tables(releases: Sequence[Any]) -> dict[float, list[ReleasedTable | SiteEvidence]]:
    """The 2×2 at every edge any site's released ROC bands have, for every site.

    At one of the site's own edges the 2×2 is exact (the bands above the edge are screen-positive); at an edge
    inside one of its merged bands, only bounds are known — TP lies between the positives above the band and
    those plus the band's — and the site contributes that interval to the likelihood. A site with a withheld
    band count is left out.
    """
    sites = []
    edges: set[float] = set()
    for table in site_tables(list(releases)):
        roc = table.extra.get("roc")
        raw = roc.get("bands") if isinstance(roc, dict) else None
        if not isinstance(raw, list) or not raw or not all(isinstance(b, dict) for b in raw):
            continue
        bands = [
            (_edge(b.get("low")), _edge(b.get("high")), _count(b.get("positive")), _count(b.get("negative")))
            for b in raw
        ]
        if any(b[2] is None or b[3] is None for b in bands):
            continue  # a withheld band count
        released = table.released_table()
        positives, negatives = sum(b[2] for b in bands), sum(b[3] for b in bands)  # type: ignore[misc]
        if (released.positives is not None and released.positives != positives) or (
            released.negatives is not None and released.negatives != negatives
        ):
            continue
        sites.append((table.site_id, bands, positives, negatives))
        edges.update(low for low, *_ in bands[1:] if low is not None)
    out: dict[float, list[ReleasedTable | SiteEvidence]] = {}
    for site_id, bands, positives, negatives in sites:
        for edge in sorted(edges):
            above = [b for b in bands if b[0] is not None and b[0] >= edge]
            tp, fp = sum(b[2] for b in above), sum(b[3] for b in above)
            inside = [b for b in bands if (b[0] is None or b[0] < edge) and (b[1] is None or b[1] > edge)]
            extra_tp, extra_fp = (inside[0][2], inside[0][3]) if inside else (0, 0)
            if extra_tp == 0 and extra_fp == 0:
                out.setdefault(edge, []).append(
                    ReleasedTable.complete(site_id, tp, fp, positives - tp, negatives - fp)  # type: ignore[operator]
                )
                continue
            out.setdefault(edge, []).append(
                SiteEvidence(
                    site_id,
                    np.ones(1),
                    np.array([positives], dtype=np.int64),
                    np.array([negatives], dtype=np.int64),
                    (np.arange(tp, tp + extra_tp + 1, dtype=np.int64),),
                    (np.arange(fp, fp + extra_fp + 1, dtype=np.int64),),
                    censored=True,
                )
            )
    return out


def threshold_tables(releases: Sequence[Any]) -> tuple[dict[float, list[Any]], str]:
    """Each released threshold's 2×2 tables (latest release per site), and where they came from.

    Parameters
    ----------
    releases : sequence of StoredRelease (or anything with a ``release`` attribute)
        One study's stored releases.

    Returns
    -------
    tables : dict of float to list of ReleasedTable or SiteEvidence
        Withheld cells are ``None`` with the release's minimum cell size, so that the GLMM censors them; a
        threshold inside a site's merged ROC band is that site's interval evidence.
    source : str
        ``"confusion"`` (the request's thresholds) or ``"roc_bands"`` (edges of the released ROC bands).
    """
    thresholds = sorted({t.threshold for stored in releases for t in stored.release.confusion})
    tables: dict[float, list[ReleasedTable]] = {}
    for threshold in thresholds:
        rows = []
        for table in site_tables(list(releases), threshold):
            try:
                rows.append(table.released_table())
            except PoolingError:
                continue
        if rows:
            tables[threshold] = rows
    if len(tables) >= 2:
        return tables, "confusion"
    bands = _band_tables(releases)
    if len(bands) >= 2:
        return bands, "roc_bands"
    return tables, "confusion"


def _thin(tables: dict[float, list[Any]]) -> dict[float, list[Any]]:
    """Thresholds with a table from at least 2 sites; at most MAX_THRESHOLDS, those most sites know exactly.

    Each site merges its ROC bands on its own, so an edge may be exact at one site and inside a band at
    another; each threshold also costs a GLMM fit, so fine bands are cut to the edges most sites share.
    """
    shared = {k: v for k, v in tables.items() if len(v) >= 2}
    if len(shared) <= MAX_THRESHOLDS:
        return shared
    exact = {k: sum(isinstance(t, ReleasedTable) for t in v) for k, v in shared.items()}
    ranked = sorted(shared, key=lambda k: (-exact[k], -len(shared[k]), k))[:MAX_THRESHOLDS]
    return {k: shared[k] for k in sorted(ranked)}


def decision_analysis(
    releases: Sequence[Any],
    score_kind: str | None,
    target_sensitivity: float | None = None,
    bootstrap: int = DEFAULT_BOOTSTRAP,
    range_low: float = 0.01,
    range_high: float = 0.99,
    seed: int = 2026,
    points: int = 5,
) -> dict[str, Any]:
    """Pooled accuracy by threshold, the threshold chosen (target sensitivity or Youden), and net benefit.

    Parameters
    ----------
    releases : list of StoredRelease
        One study's stored releases.
    score_kind : {"probability", "points"} or None
        From the bundle manifest; net benefit needs a predicted risk.
    target_sensitivity : float, optional
        Choose the highest threshold whose pooled sensitivity reaches it; without it, maximise Youden's index.
    bootstrap : int, default 40
        Bootstrap resamples of sites for the threshold's interval.
    range_low, range_high : float
        The coordinator's range of threshold probabilities for the decision curve.
    seed : int
    points : int, default 5
        Gauss–Hermite points per dimension of the GLMM fits (5 keeps the report quick).

    Returns
    -------
    dict
        ``source``, ``thresholds`` (one pooled result per threshold), ``choice``, ``net_benefit`` and
        ``caution``; a part that cannot be computed is ``{"status": "not estimable: <reason>"}``.
    """
    # Many small fits: one BLAS thread is several times faster than many on a busy machine.
    with threadpool_limits(limits=1, user_api="blas"):
        return _analysis(releases, score_kind, target_sensitivity, bootstrap, range_low, range_high, seed, points)


def _analysis(
    releases: Sequence[Any],
    score_kind: str | None,
    target_sensitivity: float | None,
    bootstrap: int,
    range_low: float,
    range_high: float,
    seed: int,
    points: int,
) -> dict[str, Any]:
    tables, source = threshold_tables(releases)
    released = len(tables)
    tables = _thin(tables)
    out: dict[str, Any] = {"source": source, "caution": CAUTION, "thresholds_released": released}
    if len(tables) < 2:
        reason = (
            "not estimable: fewer than 2 thresholds at which at least 2 sites released a 2x2 table "
            "(ask for several with --thresholds)"
        )
        out.update({"thresholds": [], "choice": {"status": reason}, "net_benefit": {"status": reason}})
        return out
    pooled = pool_by_threshold(tables, points=points)
    out["thresholds"] = [p.to_dict() for p in pooled]
    criterion = "target_sensitivity" if target_sensitivity is not None else "youden"
    try:
        choice = choose_threshold(
            tables, criterion, target_sensitivity, pooled=pooled, bootstrap=bootstrap, seed=seed, points=points
        )
        out["choice"] = choice.to_dict()
    except PoolingError as error:
        out["choice"] = {"status": f"not estimable: {error}"}
    if score_kind != "probability":
        out["net_benefit"] = {
            "status": "not estimable: net benefit needs the model's score to be a predicted risk, so that a "
            "threshold is a threshold probability; this model's score is " + (score_kind or "of unknown kind")
        }
    else:
        try:
            exact = {k: [t for t in v if isinstance(t, ReleasedTable)] for k, v in tables.items()}
            out["net_benefit"] = decision_curve(exact, range_low, range_high).to_dict()
        except PoolingError as error:
            out["net_benefit"] = {"status": f"not estimable: {error}"}
    return out


def _interval(value: Any, prefix: str) -> dict[str, Any]:
    value = value if isinstance(value, dict) else {}
    return {
        prefix: value.get("estimate"),
        f"{prefix}_ci_low": value.get("ci_low"),
        f"{prefix}_ci_high": value.get("ci_high"),
    }


def _pooled(value: Any, prefix: str) -> dict[str, Any]:
    value = value if isinstance(value, dict) else {}
    return {
        prefix: value.get("estimate"),
        f"{prefix}_ci_low": value.get("ci_low"),
        f"{prefix}_ci_high": value.get("ci_high"),
        f"{prefix}_pi_low": value.get("pi_low"),
        f"{prefix}_pi_high": value.get("pi_high"),
        f"{prefix}_tau2": value.get("tau2"),
    }


def decision_rows(result: dict[str, Any]) -> dict[str, list[dict[str, Any]]]:
    """Tidy rows (one observation per row, flat columns) of :func:`decision_analysis`'s result.

    Returns
    -------
    dict
        ``threshold_accuracy`` (one row per threshold), ``threshold_choice`` (one row),
        ``net_benefit_sites`` (one row per site and threshold probability) and ``net_benefit_pooled`` (one
        row per threshold probability).
    """
    accuracy = []
    for entry in result.get("thresholds", []):
        row: dict[str, Any] = {"threshold": entry.get("threshold"), "status": entry.get("status")}
        for measure in ("sensitivity", "specificity"):
            row |= _interval(entry.get(measure), measure)
            prediction = entry.get(f"{measure}_prediction") or {}
            row[f"{measure}_pi_low"] = prediction.get("ci_low")
            row[f"{measure}_pi_high"] = prediction.get("ci_high")
            row[f"tau_logit_{measure}"] = entry.get(f"tau_logit_{measure}")
        row["sites_pooled"] = len(entry.get("sites_pooled", []))
        row["sites_not_pooled"] = len(entry.get("sites_not_pooled", []))
        accuracy.append(row)
    choice = result.get("choice", {})
    choice_row = {
        "criterion": choice.get("criterion"),
        "target": choice.get("target"),
        "status": choice.get("status"),
        "threshold": choice.get("threshold"),
        "threshold_ci_low": choice.get("ci_low"),
        "threshold_ci_high": choice.get("ci_high"),
        **_interval(choice.get("sensitivity"), "sensitivity"),
        **_interval(choice.get("specificity"), "specificity"),
        "bootstrap_replicates": choice.get("replicates"),
    }
    sites, pooled = [], []
    for point in result.get("net_benefit", {}).get("points", []) if isinstance(result.get("net_benefit"), dict) else []:
        pt = point.get("threshold_probability")
        for site in point.get("sites", []):
            sites.append(
                {
                    "threshold_probability": pt,
                    "site_id": site.get("site_id"),
                    "net_benefit_model": site.get("model"),
                    "net_benefit_model_se": site.get("model_se"),
                    "net_benefit_screen_all": site.get("screen_all"),
                    "net_benefit_screen_none": 0.0,
                    "advantage_over_screen_all": site.get("advantage_over_all"),
                    "prevalence": site.get("prevalence"),
                    "analysed": site.get("analysed"),
                }
            )
        pooled.append(
            {
                "threshold_probability": pt,
                "status": point.get("status"),
                **_pooled(point.get("model"), "net_benefit_model"),
                **_pooled(point.get("screen_all"), "net_benefit_screen_all"),
                **_pooled(point.get("advantage_over_all"), "advantage_over_screen_all"),
                "net_benefit_screen_none": 0.0,
                "sites_not_pooled": len(point.get("sites_not_pooled", [])),
            }
        )
    return {
        "threshold_accuracy": accuracy,
        "threshold_choice": [choice_row],
        "net_benefit_sites": sites,
        "net_benefit_pooled": pooled,
    }


_INTERVAL = "95% confidence interval"
# Each tidy table of decision_rows: (title, ((column, meaning), ...)), for an export's codebook.
DECISION_TABLES: dict[str, tuple[str, tuple[tuple[str, str], ...]]] = {
    "threshold_accuracy": (
        "Pooled sensitivity and specificity at each released threshold (exact binomial GLMM per threshold)",
        (
            ("threshold", "score threshold (screen-positive when score >= threshold)"),
            ("status", "estimated, or not estimable with the reason"),
            *(
                item
                for measure in ("sensitivity", "specificity")
                for item in (
                    (measure, f"pooled {measure}"),
                    (f"{measure}_ci_low", f"{_INTERVAL}, lower end"),
                    (f"{measure}_ci_high", f"{_INTERVAL}, upper end"),
                    (f"{measure}_pi_low", "95% prediction interval for a new site, lower end"),
                    (f"{measure}_pi_high", "95% prediction interval for a new site, upper end"),
                    (f"tau_logit_{measure}", f"between-site SD of logit {measure}"),
                )
            ),
            ("sites_pooled", "sites pooled at this threshold"),
            ("sites_not_pooled", "sites that released a table here but could not be pooled"),
        ),
    ),
    "threshold_choice": (
        "The threshold the criterion picks, with a bootstrap interval over sites (optimistic for these sites)",
        (
            ("criterion", "youden (highest pooled sensitivity + specificity - 1) or target_sensitivity"),
            ("target", "target pooled sensitivity (target_sensitivity only)"),
            ("status", "estimated, or not estimable with the reason"),
            ("threshold", "the chosen released threshold"),
            ("threshold_ci_low", "95% bootstrap percentile interval of the chosen threshold, lower end"),
            ("threshold_ci_high", "95% bootstrap percentile interval of the chosen threshold, upper end"),
            ("sensitivity", "pooled sensitivity at the chosen threshold"),
            ("sensitivity_ci_low", f"{_INTERVAL}, lower end"),
            ("sensitivity_ci_high", f"{_INTERVAL}, upper end"),
            ("specificity", "pooled specificity at the chosen threshold"),
            ("specificity_ci_low", f"{_INTERVAL}, lower end"),
            ("specificity_ci_high", f"{_INTERVAL}, upper end"),
            ("bootstrap_replicates", "bootstrap resamples of sites"),
        ),
    ),
    "net_benefit_sites": (
        "Net benefit per site at each released threshold probability (predicted-risk models only)",
        (
            ("threshold_probability", "threshold probability pt (= the released score threshold)"),
            ("site_id", "site"),
            ("net_benefit_model", "TP/n - FP/n x pt/(1 - pt); NA when a count it needs was withheld"),
            ("net_benefit_model_se", "its standard error (multinomial)"),
            ("net_benefit_screen_all", "assessing everyone: prevalence - (1 - prevalence) x pt/(1 - pt)"),
            ("net_benefit_screen_none", "assessing no one: 0"),
            ("advantage_over_screen_all", "model minus assessing everyone"),
            ("prevalence", "share of analysed participants with the condition"),
            ("analysed", "participants analysed"),
        ),
    ),
    "net_benefit_pooled": (
        "Net benefit pooled across sites (REML random effects, Hartung-Knapp interval, prediction interval)",
        (
            ("threshold_probability", "threshold probability pt"),
            ("status", "estimated, or not estimable with the reason"),
            *(
                item
                for prefix, what in (
                    ("net_benefit_model", "screening by the model"),
                    ("net_benefit_screen_all", "assessing everyone"),
                    ("advantage_over_screen_all", "the model's advantage over assessing everyone"),
                )
                for item in (
                    (prefix, f"pooled net benefit of {what}"),
                    (f"{prefix}_ci_low", f"{_INTERVAL}, lower end"),
                    (f"{prefix}_ci_high", f"{_INTERVAL}, upper end"),
                    (f"{prefix}_pi_low", "95% prediction interval for a new site, lower end"),
                    (f"{prefix}_pi_high", "95% prediction interval for a new site, upper end"),
                    (f"{prefix}_tau2", "between-site variance"),
                )
            ),
            ("net_benefit_screen_none", "assessing no one: 0"),
            ("sites_not_pooled", "sites whose counts needed for net benefit were withheld"),
        ),
    ),
}
