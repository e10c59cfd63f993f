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
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from threadpoolctl import threadpool_limits

from federation.protocol import Release, ValidationToolError
from federation.protocol.documents import calibration_intercept
from federation.protocol.words import withheld_cells
from federation.ranges import primary_ranges
from federation.stats import (
    RULES,
    PoolingError,
    ReleasedTable,
    SiteBands,
    diagnostic_odds_ratio,
    glmm_accuracy,
    likelihood_ratios,
    multiple_threshold_roc,
    paired_difference,
    pool_auc,
    pool_auc_difference,
    pool_calibration_intercept,
    pool_calibration_slope,
    pool_observed_expected,
    predictive_values,
    random_effects,
    reitsma,
    subgroup_analysis,
    wilson,
)
from federation.stats.headline import METHOD as HEADLINE_METHOD
from federation.stats.headline import PREDICTION_CONVENTION, headline_accuracy

from .further_analysis import further_results
from .labels import level_label
from .store import Store, StoredRelease

CELLS = ("tp", "fp", "fn", "tn")


class AnalysisError(ValidationToolError):
    pass


@dataclass(frozen=True)
class SiteTable:
    site_id: str
    threshold: float
    cells: dict[str, int | None]
    suppressed: tuple[str, ...]
    flow: dict[str, Any]
    policy: dict[str, Any] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)
    # What the recipient can work out about each withheld cell or margin (federation.ranges), the rule that
    # withheld it where the release says so, and whether the site's rule can be replayed exactly.
    ranges: dict[str, tuple[int, int]] = field(default_factory=dict)
    suppressed_by: dict[str, str] = field(default_factory=dict)
    replayable: bool = False
    # What the site cut back so that its primary table could be released (the release's ``cut_back``, in words).
    cut_back: tuple[dict[str, str], ...] = ()

    def released_table(self) -> ReleasedTable:
        """The table with what the release says about its hidden cells (policy, flow margins, ranges, rules)."""
        excluded = self.flow.get("excluded") if isinstance(self.flow.get("excluded"), dict) else {}
        k = self.policy.get("min_cell_size")
        return ReleasedTable(
            self.site_id,
            *(self.cells.get(c) for c in CELLS),
            positives=self.flow.get("analysed_positive"),
            negatives=self.flow.get("analysed_negative"),
            analysed=self.flow.get("analysed"),
            read=self.flow.get("read"),
            excluded=tuple(excluded.values()),
            excluded_names=tuple(str(name) for name in excluded),
            min_cell_size=k if isinstance(k, int) and not isinstance(k, bool) else None,
            allow_zero=bool(self.policy.get("allow_zero", True)),
            ranges=self.ranges,
            suppressed_by=self.suppressed_by,
            replayable=self.replayable,
        )


def choose_study(store: Store, study_id: str | None) -> str:
    studies = store.studies()
    if study_id:
        if study_id not in studies:
            raise AnalysisError(f"{store.path}: no study {study_id!r} (studies: {', '.join(studies) or 'none'})")
        return study_id
    if len(studies) != 1:
        raise AnalysisError(
            f"{store.path}: holds {len(studies)} studies; name one with --study-id ({', '.join(studies)})"
        )
    return studies[0]


# Where a release names the rule that withheld a count (``suppressed_by``), the names the pooling uses.
_FLOW_NAMES = {"analysed_positive": "positives", "analysed_negative": "negatives", "analysed": "analysed"}
# Release sections whose counts relate to the 2x2 (any of them makes the site's rule too rich to replay).
_COUNT_SECTIONS = ("roc", "calibration", "margin", "agreement", "paired", "subgroups")


def _rules_named(release: Release, table: Any) -> dict[str, str]:
    """The ``suppressed_by`` entries of the 2x2 and the flow, by the pooling's names (empty when not given)."""
    named: dict[str, str] = {}
    cells = getattr(table, "suppressed_by", None)
    if isinstance(cells, dict):
        named.update({c: str(rule) for c, rule in cells.items() if c in CELLS})
    flow = release.flow.get("suppressed_by")
    if isinstance(flow, dict):
        named.update({_FLOW_NAMES[n]: str(rule) for n, rule in flow.items() if n in _FLOW_NAMES})
    return {name: rule for name, rule in named.items() if rule in RULES}


def _all_rules(release: Release, table: Any) -> list[str]:
    """Every rule the release names for the 2x2 and the flow (exclusions and records read included)."""
    found = list((getattr(table, "suppressed_by", None) or {}).values())
    flow = release.flow.get("suppressed_by")
    return found + (list(flow.values()) if isinstance(flow, dict) else [])


def site_tables(releases: list[StoredRelease], threshold: float | None = None) -> list[SiteTable]:
    """The latest release of each site, at ``threshold`` (default: each release's first table).

    Each table carries the feasible ranges of its withheld cells and margins, computed from every release
    the site sent to the study (:func:`federation.ranges.primary_ranges`).
    """
    latest: dict[str, StoredRelease] = {}
    by_site: dict[str, list[Release]] = {}
    for stored in releases:
        by_site.setdefault(stored.release.site_id, []).append(stored.release)
        previous = latest.get(stored.release.site_id)
        if previous is None or stored.release.created_at >= previous.release.created_at:
            latest[stored.release.site_id] = stored
    tables = []
    for site_id in sorted(latest):
        release = latest[site_id].release
        candidates = [
            (i, t) for i, t in enumerate(release.confusion) if threshold is None or math.isclose(t.threshold, threshold)
        ]
        if not candidates:
            continue
        index, table = candidates[0]
        others = [r for r in by_site[site_id] if r is not release]
        ranges = primary_ranges(release, index, others) if table.suppressed or None in release.flow.values() else {}
        rules = _rules_named(release, table)
        replayable = (
            not others
            and len(release.confusion) == 1
            and not any(name in release.extra for name in _COUNT_SECTIONS)
            and not any(rule in ("audit", "coarsened") for rule in _all_rules(release, table))
        )
        tables.append(
            SiteTable(
                site_id,
                table.threshold,
                dict(table.cells),
                table.suppressed,
                release.flow,
                dict(release.policy),
                dict(release.extra),
                ranges=ranges,
                suppressed_by=rules,
                replayable=replayable,
                cut_back=tuple(release.cut_back) if index == 0 else (),
            )
        )
    return tables


def _not_estimated(reason: str) -> dict[str, str]:
    return {"status": "not estimated", "reason": reason}


def _attempt(function: Callable[..., Any], *args: Any, **kwargs: Any) -> dict[str, Any]:
    """Run a pooling function; its result as JSON, or why it could not be estimated."""
    try:
        return function(*args, **kwargs).to_dict()
    except PoolingError as error:  # written for people: names the site and the rule, never a count
        return _not_estimated(str(error))
    except (ValueError, ArithmeticError):  # any other failure inside a fit: no internal text reaches a person
        return _not_estimated("not estimable: the model could not be fitted to these data")


def _proportion(x: int, n: int) -> dict[str, float] | None:
    if n <= 0:
        return None
    interval = wilson(x, n)
    return {"estimate": interval.estimate, "ci_low": interval.ci_low, "ci_high": interval.ci_high}


def _logit_with_variance(x: float, n: float) -> tuple[float, float]:
    return math.log(x / (n - x)), 1.0 / x + 1.0 / (n - x)


def _expit(value: float) -> float:
    return 1.0 / (1.0 + math.exp(-value))


def _logit_pair(events: int | None, others: int | None) -> tuple[float | None, float | None]:
    """Logit of events/(events + others) and its variance, 0.5 added to both when one is 0."""
    if events is None or others is None or events + others == 0:
        return None, None
    a, b = (events + 0.5, others + 0.5) if 0 in (events, others) else (float(events), float(others))
    return math.log(a / b), 1 / a + 1 / b


def _hidden(table: SiteTable) -> list[str]:
    """The cells a table does not show (suppressed, or missing from the release)."""
    return [c for c in CELLS if table.cells.get(c) is None]


def pool_accuracy(tables: list[SiteTable]) -> dict[str, Any]:
    """Univariate DerSimonian–Laird pooling of logit sensitivity and specificity (complete tables only)."""
    pooled_sites, not_pooled = [], []
    sens_est, sens_var, spec_est, spec_var = [], [], [], []
    corrected = []
    for table in tables:
        hidden = _hidden(table)
        if hidden:
            not_pooled.append({"site_id": table.site_id, "reason": withheld_cells(hidden)})
            continue
        cells = {c: float(table.cells[c]) for c in CELLS}  # type: ignore[arg-type]
        if cells["tp"] + cells["fn"] == 0 or cells["fp"] + cells["tn"] == 0:
            not_pooled.append({"site_id": table.site_id, "reason": "no participants with or without the condition"})
            continue
        if min(cells.values()) == 0:
            cells = {c: v + 0.5 for c, v in cells.items()}
            corrected.append(table.site_id)
        est, var = _logit_with_variance(cells["tp"], cells["tp"] + cells["fn"])
        sens_est.append(est)
        sens_var.append(var)
        est, var = _logit_with_variance(cells["tn"], cells["tn"] + cells["fp"])
        spec_est.append(est)
        spec_var.append(var)
        pooled_sites.append(table.site_id)
    result: dict[str, Any] = {
        "method": "DerSimonian-Laird random effects on the logit scale, Wald 95% interval, "
        "prediction interval with t on k-2 df",
        "sites_pooled": pooled_sites,
        "sites_not_pooled": not_pooled,
        "continuity_corrected_sites": corrected,
    }
    if len(pooled_sites) < 2:
        result.update(
            {
                "sensitivity": None,
                "specificity": None,
                "tau2_logit_sensitivity": None,
                "tau2_logit_specificity": None,
                "i2_logit_sensitivity": None,
                "i2_logit_specificity": None,
                "note": f"pooling needs at least 2 sites with releasable 2x2 tables; {len(pooled_sites)} available",
            }
        )
        return result
    for name, estimates, variances in (("sensitivity", sens_est, sens_var), ("specificity", spec_est, spec_var)):
        pooled = random_effects(estimates, variances, method="DL")
        result[name] = {
            "estimate": _expit(pooled.estimate),
            "ci_low": _expit(pooled.ci_low),
            "ci_high": _expit(pooled.ci_high),
            "pi_low": None if pooled.pi_low is None else _expit(pooled.pi_low),
            "pi_high": None if pooled.pi_high is None else _expit(pooled.pi_high),
        }
        result[f"tau2_logit_{name}"] = pooled.tau2
        result[f"i2_logit_{name}"] = pooled.i2
        result[f"q_logit_{name}"] = pooled.q
    return result


def _interval_dict(interval: Any) -> dict[str, Any]:
    return {
        "estimate": interval.estimate,
        "ci_low": interval.ci_low,
        "ci_high": interval.ci_high,
        "method": interval.method,
    }


def _site_accuracy(table: SiteTable, prevalence: float | None) -> dict[str, Any]:
    """PPV/NPV, likelihood ratios and DOR of a complete table (None where undefined)."""
    out: dict[str, Any] = {
        "prevalence": None,
        "ppv": None,
        "npv": None,
        "likelihood_ratio_positive": None,
        "likelihood_ratio_negative": None,
        "diagnostic_odds_ratio": None,
    }
    if prevalence is not None:
        out.update(
            {"stated_prevalence": prevalence, "ppv_at_stated_prevalence": None, "npv_at_stated_prevalence": None}
        )
    if _hidden(table):
        return out
    tp, fp, fn, tn = (int(table.cells[c]) for c in CELLS)  # type: ignore[arg-type]
    total = tp + fp + fn + tn
    if total == 0:
        return out
    out["prevalence"] = (tp + fn) / total
    out["ppv"] = _proportion(tp, tp + fp)
    out["npv"] = _proportion(tn, tn + fn)
    if tp + fn > 0 and fp + tn > 0:
        positive, negative = likelihood_ratios(tp, fp, fn, tn)
        out["likelihood_ratio_positive"] = _interval_dict(positive)
        out["likelihood_ratio_negative"] = _interval_dict(negative)
        out["diagnostic_odds_ratio"] = _interval_dict(diagnostic_odds_ratio(tp, fp, fn, tn))
        if prevalence is not None:
            ppv, npv = predictive_values(tp / (tp + fn), tn / (tn + fp), prevalence)
            out["ppv_at_stated_prevalence"], out["npv_at_stated_prevalence"] = ppv, npv
    return out


def _interval_json(interval: Any) -> dict[str, Any] | None:
    if interval is None:
        return None
    return {
        "estimate": interval.estimate,
        "ci_low": interval.ci_low,
        "ci_high": interval.ci_high,
        "method": interval.method,
    }


def headline_pooling(tables: list[SiteTable]) -> dict[str, Any]:
    """The ``pooled`` section: the headline bivariate binomial GLMM over every site, then the sensitivity analyses.

    Top-level keys describe the headline (``federation.stats.headline``): ``sensitivity`` and ``specificity``
    with profile-likelihood intervals and prediction intervals (``pi_low``/``pi_high``), ``tau_logit_*`` and
    ``correlation`` with their intervals, ``tau2_logit_*``, ``sites_pooled`` (every site whose release bounds
    its table), ``censored_sites``, and ``not_estimable`` (quantity -> "not estimable: <reason>"; the quantity
    itself is then ``None``). ``bivariate_glmm_suppression_aware`` holds the same fit in full (SROC, regions).
    Sensitivity analyses, labelled so: ``sensitivity_analyses.univariate`` (DerSimonian-Laird on complete
    tables, continuity-corrected), ``bivariate`` (normal approximation, REML, complete tables) and
    ``bivariate_glmm`` (binomial GLMM of complete tables only).
    """
    released, invalid = [], []
    for table in tables:
        try:
            released.append(table.released_table())
        except PoolingError as error:
            invalid.append({"site_id": table.site_id, "reason": str(error)})
    headline = headline_accuracy(released)
    not_estimable = dict(headline.not_estimable)
    pooled: dict[str, Any] = {
        "model": "headline",
        "method": HEADLINE_METHOD + "; intervals: profile likelihood (summary point referred to t on k-2 df, "
        "between-site SDs and correlation to chi-squared 1 df); " + PREDICTION_CONVENTION,
    }
    for name in ("sensitivity", "specificity"):
        interval = getattr(headline, name)
        prediction = getattr(headline, f"{name}_prediction")
        entry = _interval_json(interval)
        if entry is not None:
            entry["pi_low"] = None if prediction is None else prediction.ci_low
            entry["pi_high"] = None if prediction is None else prediction.ci_high
        pooled[name] = entry
    for name, key in (("sensitivity", "tau_logit_sensitivity"), ("specificity", "tau_logit_fpr")):
        tau = getattr(headline, key)
        pooled[f"tau_logit_{name}"] = _interval_json(tau)
        pooled[f"tau2_logit_{name}"] = None if tau is None or tau.estimate is None else tau.estimate**2
        pooled[f"i2_logit_{name}"] = None  # I² belongs to the univariate model (sensitivity analysis below)
        if key in not_estimable:
            not_estimable[f"tau_logit_{name}"] = not_estimable.pop(key)
    pooled["correlation"] = _interval_json(headline.correlation)
    pooled["not_estimable"] = not_estimable
    first = next(iter(not_estimable.values()), None)
    if pooled["sensitivity"] is None or pooled["specificity"] is None:
        pooled["note"] = first or "not estimable"
    pooled["sites_pooled"] = list(headline.sites_pooled)
    pooled["sites_not_pooled"] = [e.to_dict() for e in headline.sites_not_pooled] + invalid
    pooled["censored_sites"] = list(headline.censored_sites)
    pooled["continuity_corrected_sites"] = []
    univariate = pool_accuracy(tables)
    univariate["label"] = "sensitivity analysis: univariate, complete tables only"
    pooled["sensitivity_analyses"] = {"univariate": univariate}
    others = {
        "bivariate": _attempt(lambda: reitsma(released)),
        "bivariate_glmm": _attempt(lambda: glmm_accuracy(released, suppressed="drop")),
    }
    for key, label in (
        ("bivariate", "sensitivity analysis: normal approximation, complete tables only"),
        ("bivariate_glmm", "sensitivity analysis: binomial GLMM, complete tables only"),
    ):
        others[key]["label"] = label
        if invalid:
            others[key]["sites_not_pooled"] = [*others[key].get("sites_not_pooled", []), *invalid]
    pooled.update(others)
    pooled["bivariate_glmm_suppression_aware"] = (
        {**headline.fit.to_dict(), "label": "headline"} if headline.fit is not None else _not_estimated(first or "")
    )
    return pooled


# --- further analyses from release sections ----------------------------------------------------------


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        return None
    return float(value)


def _count(value: Any) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) and value >= 0 else None


def _section(table: SiteTable, name: str) -> dict[str, Any] | None:
    value = table.extra.get(name)
    return value if isinstance(value, dict) else None


def _bands(site_id: str, roc: dict[str, Any]) -> SiteBands | None:
    bands = roc.get("bands")
    if not isinstance(bands, list) or not bands or not all(isinstance(b, dict) for b in bands):
        return None
    low = _number(bands[0].get("low"))
    edges = [-math.inf if low is None else low]
    for band in bands:
        high = _number(band.get("high"))
        edges.append(math.inf if high is None else high)
    return SiteBands(
        site_id,
        tuple(edges),
        tuple(_count(b.get("positive")) for b in bands),
        tuple(_count(b.get("negative")) for b in bands),
        _count(roc.get("positive")),
        _count(roc.get("negative")),
    )


def _discrimination(tables: list[SiteTable]) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "roc")) for t in tables]
    sites = [(s, r) for s, r in sites if r is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]
    out: dict[str, Any] = {
        "pooled_auc": _attempt(
            lambda: pool_auc(
                ids, [_number(r.get("auc")) for _, r in sites], [_number(r.get("auc_se")) for _, r in sites]
            )
        )
    }
    bands = [b for s, r in sites if (b := _bands(s, r)) is not None]
    # Never a curve from bands summed across sites (it keeps only the edges every site shares): a model in which
    # each site keeps its own band edges and its own accuracy.
    out["summary_roc"] = (
        _attempt(lambda: multiple_threshold_roc(bands)) if bands else _not_estimated("no site released bands")
    )
    return out


def _calibration(tables: list[SiteTable]) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "calibration")) for t in tables]
    sites = [(s, c) for s, c in sites if c is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]
    observed = [_count(c.get("observed")) for _, c in sites]
    others = [_count(c.get("non_events")) for _, c in sites]
    n = [None if o is None or e is None else o + e for o, e in zip(observed, others, strict=True)]
    return {
        "observed_expected": _attempt(
            lambda: pool_observed_expected(ids, observed, [_number(c.get("expected")) for _, c in sites], n)
        ),
        "calibration_intercept": _attempt(
            lambda: pool_calibration_intercept(
                ids,
                [_number(calibration_intercept(c)) for _, c in sites],
                [_number(calibration_intercept(c, "_se")) for _, c in sites],
            )
        ),
        "calibration_slope": _attempt(
            lambda: pool_calibration_slope(
                ids, [_number(c.get("slope")) for _, c in sites], [_number(c.get("slope_se")) for _, c in sites]
            )
        ),
    }


def _paired(tables: list[SiteTable]) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "paired")) for t in tables]
    sites = [(s, p) for s, p in sites if p is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]

    def cells(label: str, keys: tuple[str, str, str, str]) -> list[list[int | None]]:
        columns: list[list[int | None]] = [[], [], [], []]
        for _, p in sites:
            table = p.get(label) if isinstance(p.get(label), dict) else {}
            for j, key in enumerate(keys):
                columns[j].append(_count(table.get(key)))
        return columns

    # Sensitivity: "correct" = called positive among the diseased; specificity: called negative among the rest.
    sens = cells("diseased", ("model1_compare1", "model1_compare0", "model0_compare1", "model0_compare0"))
    spec = cells("non_diseased", ("model0_compare0", "model0_compare1", "model1_compare0", "model1_compare1"))
    return {
        "sensitivity_difference": _attempt(
            lambda: paired_difference(ids, *sens, measure="difference in sensitivity (model minus comparison)")
        ),
        "specificity_difference": _attempt(
            lambda: paired_difference(ids, *spec, measure="difference in specificity (model minus comparison)")
        ),
        "auc_difference": _attempt(
            lambda: pool_auc_difference(
                ids,
                *([_number(p.get(key)) for _, p in sites] for key in ("auc_model", "auc_compare", "auc_model_se")),
                [_number(p.get("auc_compare_se")) for _, p in sites],
                [_number(p.get("auc_covariance")) for _, p in sites],
            )
        ),
    }


def _level_confusion(level: dict[str, Any], threshold: float) -> dict[str, Any] | None:
    tables = level.get("confusion")
    if not isinstance(tables, list):
        return None
    for entry in tables:
        if isinstance(entry, dict) and isinstance(entry.get("threshold"), int | float):
            if math.isclose(float(entry["threshold"]), threshold) and isinstance(entry.get("cells"), dict):
                return entry["cells"]
    return None


def _subgroups(tables: list[SiteTable], integer_variables: frozenset[str] = frozenset()) -> dict[str, Any] | None:
    rows: dict[str, list[tuple[str, str, dict[str, Any], float, int]]] = {}
    for table in tables:
        section = _section(table, "subgroups")
        if section is None or not isinstance(section.get("variables"), list):
            continue
        for variable in section["variables"]:
            if not isinstance(variable, dict) or not isinstance(variable.get("levels"), list):
                continue
            name = str(variable.get("variable"))
            for position, level in enumerate(variable["levels"]):
                if isinstance(level, dict):
                    label = level_label(name, level.get("level"), name in integer_variables)
                    rows.setdefault(name, []).append((table.site_id, label, level, table.threshold, position))
    if not rows:
        return None
    out: dict[str, Any] = {}
    for variable, unordered in rows.items():
        # levels in the order the request cut them (youngest band first), whichever site has an estimate first
        entries = sorted(unordered, key=lambda e: e[4])
        ids = [e[0] for e in entries]
        levels = [e[1] for e in entries]
        result: dict[str, Any] = {}
        for measure, (events, others) in (("sensitivity", ("tp", "fn")), ("specificity", ("tn", "fp"))):
            estimates, variances = [], []
            for _, _, level, threshold, _ in entries:
                cells = _level_confusion(level, threshold) or {}
                y, v = _logit_pair(_count(cells.get(events)), _count(cells.get(others)))
                estimates.append(y)
                variances.append(v)
            result[measure] = _attempt(
                subgroup_analysis, ids, estimates, variances, levels, measure=f"logit {measure}", scale="logit"
            )
        auc_y, auc_v = [], []
        for _, _, level, _, _ in entries:
            roc = level.get("roc") if isinstance(level.get("roc"), dict) else {}
            c, s = _number(roc.get("auc")), _number(roc.get("auc_se"))
            if c is None or s is None or not 0 < c < 1:
                auc_y.append(None)
                auc_v.append(None)
            else:
                auc_y.append(math.log(c / (1 - c)))
                auc_v.append((s / (c * (1 - c))) ** 2)
        if any(y is not None for y in auc_y):
            result["auc"] = _attempt(subgroup_analysis, ids, auc_y, auc_v, levels, measure="logit AUC", scale="logit")
        out[variable] = result
    return out


def analyze_tables(
    study_id: str,
    tables: list[SiteTable],
    prevalence: float | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
    integer_variables: frozenset[str] = frozenset(),
) -> dict[str, Any]:
    """Per-site and pooled results from each site's table and release sections (see the module docstring).

    ``covariates`` (optional, per site id) are coordinator-supplied site covariates for the meta-regression
    (:func:`federation.further_analysis.read_covariates`). ``integer_variables``: model inputs that take whole
    numbers, so that their subgroup bands are labelled by their first and last values ("36-47 months").
    """
    if prevalence is not None and (
        isinstance(prevalence, bool) or not isinstance(prevalence, int | float) or not 0 <= prevalence <= 1
    ):
        raise AnalysisError("prevalence: must be a number between 0 and 1")
    sites = []
    for table in tables:
        cells = table.cells
        entry: dict[str, Any] = {"site_id": table.site_id, "threshold": table.threshold}
        entry.update({c: cells[c] for c in CELLS})
        entry["suppressed"] = list(table.suppressed)
        entry["sensitivity"] = (
            _proportion(cells["tp"], cells["tp"] + cells["fn"])
            if cells["tp"] is not None and cells["fn"] is not None
            else None
        )
        entry["specificity"] = (
            _proportion(cells["tn"], cells["tn"] + cells["fp"])
            if cells["tn"] is not None and cells["fp"] is not None
            else None
        )
        entry["flow"] = table.flow
        entry["cut_back"] = [dict(cut) for cut in table.cut_back]
        entry.update(_site_accuracy(table, prevalence))
        sites.append(entry)
    pooled = headline_pooling(tables)
    result: dict[str, Any] = {"study_id": study_id, "sites": sites}
    for key, build in (
        ("discrimination", _discrimination),
        ("calibration", _calibration),
        ("paired", _paired),
        ("subgroups", lambda t: _subgroups(t, integer_variables)),
    ):
        value = build(tables)
        if value is not None:
            result[key] = value
    result["pooled"] = pooled
    # What a reviewer asks for beyond the headline (federation.further_analysis), kept apart from the above.
    result.update(further_results(tables, pooled, covariates, integer_variables))
    return result


def analyze(
    store: Store,
    study_id: str | None = None,
    prevalence: float | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
) -> dict[str, Any]:
    """Per-site and pooled results of a study, as ``federation analyze --json`` prints them.

    ``prevalence`` (optional) is a pre-test probability at which every site's PPV and NPV are also given;
    ``covariates`` (optional) are coordinator-supplied site covariates for the meta-regression.
    """
    study = choose_study(store, study_id)
    releases = store.releases(study)
    if not releases:
        raise AnalysisError(f"{store.path}: study {study!r} has no ingested releases yet")
    # Every matrix here is tiny: OpenBLAS threads cost far more than they give (about 8x slower fits on a busy
    # 2-core machine), as in the site's disclosure audit.
    with threadpool_limits(limits=1, user_api="blas"):
        return analyze_tables(study, site_tables(releases), prevalence, covariates, store.integer_features(study))


def release_sections(store: Store, study_id: str) -> dict[str, dict[str, Any]]:
    """Each site's further release sections (``roc``, ``calibration``, ``margin``, ...) from its latest release."""
    return {table.site_id: dict(table.extra) for table in site_tables(store.releases(study_id))}


def enrolled_without_release(store: Store, study_id: str) -> list[str]:
    """Sites enrolled in the store that have sent no release for ``study_id``."""
    answered = {stored.release.site_id for stored in store.releases(study_id)}
    return [site for site in store.sites() if site not in answered]
