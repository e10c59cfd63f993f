"""Per-site accuracy (Wilson intervals, predictive values, likelihood ratios) and the pooled accuracy: the
headline model first, then the univariate and bivariate sensitivity analyses.
"""

from __future__ import annotations

import math
from typing import Any

from federation.attempts import attempt as _attempt
from federation.attempts import not_estimated as _not_estimated
from federation.protocol.words import withheld_cells
from federation.stats import (
    PoolingError,
    diagnostic_odds_ratio,
    glmm_accuracy,
    likelihood_ratios,
    predictive_values,
    random_effects,
    reitsma,
    wilson,
)
from federation.stats.headline import METHOD as HEADLINE_METHOD
from federation.stats.headline import PREDICTION_CONVENTION, headline_accuracy

from .tables import CELLS, SiteTable


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
