"""Pooled results beyond the headline that a reviewer of a validation paper asks for.

Built by :func:`further_results` from the same per-site tables as :mod:`federation.analysis` and added to
``federation analyze --json`` under these keys (each present when the releases carry what it needs):

- ``agreement``: per pair of ratings (screen vs reference, screen vs second reference, reference vs second
  reference) Cohen's kappa pooled by random effects with its heterogeneity, and the discordance proportion
  pooled on the logit scale;
- ``margin``: the error rate in each score-margin band (how often the screen is wrong that close to the
  threshold) pooled on the logit scale, bands matched by their distances from the threshold;
- ``likelihood_ratios``: LR+, LR− and the diagnostic odds ratio derived from the bivariate summary point
  (Zwinderman & Bossuyt 2008), never pooled site by site;
- ``small_site_effects``: Deeks' funnel plot asymmetry test;
- ``influence``: leave-one-site-out refits of the headline model (withheld cells censored);
- ``subgroup_contrasts``: each subgroup level against the reference level, estimated inside each site and
  pooled (not ecological);
- ``meta_regression``: bivariate meta-regression of sensitivity and specificity on each site covariate in
  turn (Wald tests on the complete tables, and ``likelihood_ratio_test``: the headline model with and without
  the covariate over every site that has it, withheld cells censored): prevalence and size from the
  participant flow, subgroup shares from the subgroup tables, and any coordinator-supplied covariates
  (``--covariates FILE``, :func:`read_covariates`).

Every result names its method; one that cannot be estimated is ``{"status": "not estimated", "reason"}``.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from threadpoolctl import threadpool_limits

from federation.attempts import attempt as _attempt
from federation.attempts import not_estimated
from federation.attempts import not_estimated as _not_estimated
from federation.labels import auc_bounds_lines, level_label
from federation.protocol import ValidationToolError
from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number
from federation.stats import (
    PoolingError,
    ReleasedTable,
    bivariate_meta_regression,
    deeks_funnel_test,
    headline_covariate_test,
    headline_leave_one_site_out,
    pool_kappa,
    pool_proportion,
    summary_ratios,
    within_site_auc_contrasts,
    within_site_contrasts,
)

if TYPE_CHECKING:
    from federation.analysis import SiteTable

__all__ = ["CovariateError", "further_results", "read_covariates", "summary_lines"]

CELLS = ("tp", "fp", "fn", "tn")
AGREEMENT_PAIRS = {
    "model_reference": "screen vs reference standard",
    "model_reference2": "screen vs second reference standard",
    "reference_reference2": "reference standard vs second reference standard",
}
# Bivariate results in ``pooled`` to derive likelihood ratios from, the headline first.
BIVARIATE_PREFERENCE = ("bivariate_glmm_suppression_aware", "bivariate_glmm", "bivariate")
MODEL_WORDS = {
    "bivariate_glmm_suppression_aware": "binomial model with withheld cells kept in",
    "bivariate_glmm": "binomial model of complete tables",
    "bivariate": "normal-approximation model of complete tables",
}
MAX_COVARIATES = 12


class CovariateError(ValidationToolError):
    pass


def _section(table: SiteTable, name: str) -> Any:
    return table.extra.get(name)


# --- agreement -------------------------------------------------------------------------------------------------


def _agreement(tables: Sequence[SiteTable]) -> dict[str, Any] | None:
    rows: list[tuple[str, dict[str, Any]]] = []
    for table in tables:
        section = _section(table, "agreement")
        if not isinstance(section, dict) or not section.get("available") or not isinstance(section.get("tables"), list):
            continue
        first = next((t for t in section["tables"] if isinstance(t, dict)), None)
        if first is not None and isinstance(first.get("pairs"), dict):
            rows.append((table.site_id, first["pairs"]))
    if not rows:
        return None
    ids = [site for site, _ in rows]
    out: dict[str, Any] = {}
    for pair, label in AGREEMENT_PAIRS.items():
        values = [p.get(pair) if isinstance(p.get(pair), dict) else {} for _, p in rows]
        if not any(v for v in values):
            continue
        kappa = _attempt(
            pool_kappa,
            ids,
            [_number(v.get("kappa")) for v in values],
            [_number(v.get("kappa_se")) for v in values],
            measure=f"Cohen's kappa, {label}",
        )
        discordant, totals = [], []
        for v in values:
            cells = v.get("cells") if isinstance(v.get("cells"), dict) else {}
            counts = [_count(cells.get(key)) for key in ("11", "10", "01", "00")]
            if any(c is None for c in counts):
                discordant.append(None)
                totals.append(None)
            else:
                discordant.append(counts[1] + counts[2])  # type: ignore[operator]
                totals.append(sum(counts))  # type: ignore[arg-type]
        discordance = _attempt(pool_proportion, ids, discordant, totals, measure=f"discordance, {label}")
        out[pair] = {"label": label, "kappa": kappa, "discordance": discordance}
    return out or None


# --- margin bands ----------------------------------------------------------------------------------------------


def _margin(tables: Sequence[SiteTable]) -> dict[str, Any] | None:
    bands: dict[tuple[str, Any, Any], list[tuple[str, int | None, int | None]]] = {}
    for table in tables:
        section = _section(table, "margin")
        if not isinstance(section, list):
            continue
        entry = next(
            (
                e
                for e in section
                if isinstance(e, dict)
                and isinstance(e.get("threshold"), int | float)
                and math.isclose(float(e["threshold"]), table.threshold)
            ),
            None,
        )
        if entry is None:
            continue
        for side in ("called_positive", "called_negative"):
            for row in entry.get(side) or []:
                if not isinstance(row, dict):
                    continue
                correct, wrong = _count(row.get("correct")), _count(row.get("wrong"))
                near, far = _number(row.get("distance_from")), _number(row.get("distance_to"))
                key = (side, None if near is None else round(near, 9), None if far is None else round(far, 9))
                total = None if correct is None or wrong is None else correct + wrong
                bands.setdefault(key, []).append((table.site_id, wrong, total))
    if not bands:
        return None
    out = []
    for (side, near, far), rows in sorted(bands.items(), key=lambda kv: (kv[0][0], kv[0][1] or 0.0)):
        screen = "screen-positive" if side == "called_positive" else "screen-negative"
        if far is None:
            span = "at any distance from the threshold" if not near else f"{near:g} or more from the threshold"
        else:
            span = f"{near or 0:g} to {far:g} from the threshold"
        label = f"error rate, {screen}, score {span}"
        pooled = (
            _attempt(pool_proportion, [r[0] for r in rows], [r[1] for r in rows], [r[2] for r in rows], measure=label)
            if len(rows) >= 2
            else _not_estimated("fewer than 2 sites released this band")
        )
        out.append({"band": label, "screen": screen, "distance_from": near, "distance_to": far, "error_rate": pooled})
    return {
        "bands": out,
        "note": "a band is pooled across the sites that released exactly that band (sites may merge bands)",
    }


# --- likelihood ratios from the bivariate model ----------------------------------------------------------------


def _likelihood_ratios(pooled: dict[str, Any]) -> dict[str, Any] | None:
    if pooled.get("sensitivity") is None:
        # No headline (too few sites): no pooled ratio either, as a bivariate fit of two or three sites would
        # be read as one (found by following the coordinator's guide: LR+ and DOR from two sites)
        note = pooled.get("note")
        return not_estimated(note if isinstance(note, str) and note else "not estimable: no pooled sensitivity")
    for key in BIVARIATE_PREFERENCE:
        fit = pooled.get(key)
        if not isinstance(fit, dict) or _number(fit.get("mean_logit_sensitivity")) is None:
            continue
        try:
            mean = [float(fit["mean_logit_sensitivity"]), float(fit["mean_logit_fpr"])]
            s1, s2, c = (float(fit[k]) for k in ("se_logit_sensitivity", "se_logit_fpr", "covariance_of_means"))
        except (KeyError, TypeError, ValueError):
            continue
        result = _attempt(summary_ratios, mean, [[s1 * s1, c], [c, s2 * s2]])
        result["from_model"] = key
        result["from_model_described"] = f"the bivariate {MODEL_WORDS.get(key, key)}"
        return result
    return None


# --- Deeks' test and leave-one-site-out --------------------------------------------------------------------------


def _complete(tables: Sequence[SiteTable]) -> list[SiteTable]:
    return [t for t in tables if all(t.cells.get(c) is not None for c in CELLS)]


def _small_site_effects(tables: Sequence[SiteTable]) -> dict[str, Any]:
    complete = _complete(tables)
    return _attempt(deeks_funnel_test, [t.site_id for t in complete], *([t.cells[c] for t in complete] for c in CELLS))


def _released(tables: Sequence[SiteTable]) -> list[ReleasedTable]:
    out = []
    for table in tables:
        try:
            out.append(table.released_table())
        except PoolingError:
            continue
    return out


def _influence(tables: Sequence[SiteTable]) -> dict[str, Any]:
    result = _attempt(headline_leave_one_site_out, _released(tables))
    result.setdefault(
        "note",
        "leave-one-site-out refits of the headline model (the bivariate binomial GLMM over every site, withheld "
        "cells censored), each started from the fit to every site (Viechtbauer & Cheung 2010)",
    )
    return result


# --- subgroup contrasts within sites -----------------------------------------------------------------------------


def _level_cells(level: dict[str, Any], threshold: float) -> dict[str, Any] | None:
    for entry in level.get("confusion") or []:
        if isinstance(entry, dict) and isinstance(entry.get("threshold"), int | float):
            if math.isclose(float(entry["threshold"]), threshold) and isinstance(entry.get("cells"), dict):
                return entry["cells"]
    return None


def _subgroup_levels(
    tables: Sequence[SiteTable], integer_variables: frozenset[str] = frozenset()
) -> dict[str, list[tuple[str, str, dict[str, Any], dict[str, Any]]]]:
    """Per subgroup variable: (site, level, the level's 2x2 cells, the level's ROC section) rows."""
    rows: dict[str, list[tuple[str, str, dict[str, Any], dict[str, Any]]]] = {}
    for table in tables:
        section = _section(table, "subgroups")
        if not isinstance(section, dict) or not isinstance(section.get("variables"), list):
            continue
        for variable in section["variables"]:
            if not isinstance(variable, dict) or not isinstance(variable.get("levels"), list):
                continue
            for level in variable["levels"]:
                if isinstance(level, dict):
                    cells = _level_cells(level, table.threshold) or {}
                    roc = level.get("roc") if isinstance(level.get("roc"), dict) else {}
                    name = str(variable.get("variable"))
                    label = level_label(name, level.get("level"), name in integer_variables)
                    rows.setdefault(name, []).append((table.site_id, label, cells, roc))
    return rows


def _subgroup_contrasts(
    tables: Sequence[SiteTable], integer_variables: frozenset[str] = frozenset()
) -> dict[str, Any] | None:
    rows = _subgroup_levels(tables, integer_variables)
    if not rows:
        return None
    out: dict[str, Any] = {}
    for variable, entries in rows.items():
        result: dict[str, Any] = {}
        for measure, (events, others) in (("sensitivity", ("tp", "fn")), ("specificity", ("tn", "fp"))):
            counts = [(_count(c.get(events)), _count(c.get(others))) for _, _, c, _ in entries]
            totals = [None if e is None or o is None else e + o for e, o in counts]
            try:
                contrasts = within_site_contrasts(
                    [e[0] for e in entries], [e[1] for e in entries], [e for e, _ in counts], totals, measure=measure
                )
            except PoolingError as error:
                result[measure] = _not_estimated(str(error))
                continue
            result[measure] = (
                [c.to_dict() for c in contrasts]
                if contrasts
                else _not_estimated("no level shares at least 2 sites with the reference level")
            )
        auc = [_number(roc.get("auc")) for _, _, _, roc in entries]
        if any(a is not None for a in auc):
            try:
                contrasts = within_site_auc_contrasts(
                    [e[0] for e in entries],
                    [e[1] for e in entries],
                    auc,
                    [_number(r.get("auc_se")) for *_, r in entries],
                )
                result["auc"] = (
                    [c.to_dict() for c in contrasts]
                    if contrasts
                    else _not_estimated("no level shares at least 2 sites with the reference level")
                )
            except PoolingError as error:
                result["auc"] = _not_estimated(str(error))
        out[variable] = result
    return out


# --- meta-regression on site covariates ----------------------------------------------------------------------


def read_covariates(path: Path) -> dict[str, dict[str, float | str]]:
    """Site covariates from a CSV file: a ``site_id`` column and one column per covariate.

    A column whose every non-empty value is a number is numeric; any other column is a category (indicator
    columns against its first value in sorted order). An empty cell is a missing value (that site is left out
    of that covariate's regression). Raises :class:`CovariateError` with one line naming the file, the row or
    column, and the rule broken.
    """
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as error:
        raise CovariateError(f"{path}: cannot read the covariates file ({type(error).__name__})") from None
    reader = csv.DictReader(text.splitlines())
    fields = reader.fieldnames or []
    if "site_id" not in fields:
        raise CovariateError(f"{path}: the header needs a site_id column")
    names = [f for f in fields if f != "site_id"]
    if not names:
        raise CovariateError(f"{path}: no covariate columns besides site_id")
    if len(names) > MAX_COVARIATES or len(set(names)) != len(names) or any(not n.strip() for n in names):
        raise CovariateError(f"{path}: covariate columns must be named, distinct, and at most {MAX_COVARIATES}")
    out: dict[str, dict[str, float | str]] = {}
    raw: dict[str, dict[str, str]] = {}
    for line, row in enumerate(reader, start=2):
        site = (row.get("site_id") or "").strip()
        if not site:
            raise CovariateError(f"{path}: row {line}: site_id is empty")
        if site in raw:
            raise CovariateError(f"{path}: row {line}: site {site!r} appears twice")
        if None in row:
            raise CovariateError(f"{path}: row {line}: more values than header columns")
        raw[site] = {n: (row.get(n) or "").strip() for n in names}
    for name in names:
        values = [r[name] for r in raw.values() if r[name]]
        numeric = True
        for value in values:
            try:
                if not math.isfinite(float(value)):
                    raise ValueError
            except ValueError:
                numeric = False
                break
        for site, row in raw.items():
            if row[name]:
                out.setdefault(site, {})[name] = float(row[name]) if numeric else row[name]
    return out


def _release_covariates(tables: Sequence[SiteTable]) -> dict[str, dict[str, float | str]]:
    """Covariates a release carries: prevalence and size from the flow, each subgroup level's share."""
    out: dict[str, dict[str, float | str]] = {}
    for table in tables:
        flow = table.flow or {}
        positive, analysed = _count(flow.get("analysed_positive")), _count(flow.get("analysed"))
        values: dict[str, float | str] = {}
        if positive is not None and analysed:
            values["prevalence"] = positive / analysed
            values["log participants"] = math.log(analysed)
        out[table.site_id] = values
    for variable, entries in _subgroup_levels(tables).items():
        by_site: dict[str, list[tuple[str, int | None]]] = {}
        for site, level, cells, _ in entries:
            counts = [_count(cells.get(c)) for c in CELLS]
            by_site.setdefault(site, []).append((level, None if None in counts else sum(counts)))  # type: ignore[arg-type]
        levels = list(dict.fromkeys(level for _, level, _, _ in entries))
        for level in levels[1:]:
            for site, pairs in by_site.items():
                totals = dict(pairs)
                if all(v is not None for v in totals.values()) and sum(totals.values()) > 0:  # type: ignore[arg-type]
                    share = (totals.get(level) or 0) / sum(totals.values())  # type: ignore[arg-type]
                    out.setdefault(site, {})[f"share {variable} = {level}"] = share
    return out


def _columns(values: list[float | str]) -> tuple[np.ndarray, list[str]] | None:
    if all(isinstance(v, float) for v in values):
        return np.array(values, dtype=float).reshape(-1, 1), []
    categories = sorted({str(v) for v in values})
    if len(categories) < 2:
        return None
    matrix = np.array([[1.0 if str(v) == c else 0.0 for c in categories[1:]] for v in values])
    return matrix, categories


def _logits(table: SiteTable) -> tuple[list[float], list[float]] | None:
    cells = [table.cells.get(c) for c in CELLS]
    if any(c is None for c in cells):
        return None
    tp, fp, fn, tn = (float(c) for c in cells)  # type: ignore[arg-type]
    if tp + fn == 0 or fp + tn == 0:
        return None
    if min(tp, fp, fn, tn) == 0:
        tp, fp, fn, tn = tp + 0.5, fp + 0.5, fn + 0.5, tn + 0.5
    return [math.log(tp / fn), math.log(fp / tn)], [1 / tp + 1 / fn, 1 / fp + 1 / tn]


def _meta_regression(
    tables: Sequence[SiteTable], supplied: dict[str, dict[str, float | str]] | None
) -> dict[str, Any] | None:
    covariates = _release_covariates(tables)
    source = {name: "release" for values in covariates.values() for name in values}
    for site, values in (supplied or {}).items():
        for name, value in values.items():
            covariates.setdefault(site, {})[name] = value
            source[name] = "coordinator"
    names = list(dict.fromkeys(name for values in covariates.values() for name in values))
    if not names:
        return None
    logits = {t.site_id: found for t in tables if (found := _logits(t)) is not None}
    released = _released(tables)
    out: dict[str, Any] = {}
    for name in names:
        likelihood_ratio = _likelihood_ratio(name, released, covariates)
        sites = [s for s in logits if name in covariates.get(s, {})]
        values = [covariates[s][name] for s in sites]
        if len({type(v) for v in values}) > 1:
            out[name] = _not_estimated("mixes numbers and categories")
            continue
        columns = _columns(values) if sites else None
        if columns is None:
            out[name] = _not_estimated("fewer than 2 categories among the sites with complete tables")
            out[name]["likelihood_ratio_test"] = likelihood_ratio
            continue
        matrix, categories = columns
        labels = [name] if not categories else [f"{name} = {c} (vs {categories[0]})" for c in categories[1:]]
        result = _attempt(
            bivariate_meta_regression,
            np.array([logits[s][0] for s in sites]),
            np.array([logits[s][1] for s in sites]),
            matrix,
            labels,
            site_ids=sites,
        )
        result["source"] = source[name]
        if "effects" in result and len(sites) < 10:
            # Common practice: about ten sites per covariate before a meta-regression is more than exploratory.
            result["caution"] = f"{len(sites)} sites: exploratory (Wald tests on few sites are too liberal)"
        result["likelihood_ratio_test"] = likelihood_ratio
        out[name] = result
    return out


def _likelihood_ratio(
    name: str, released: Sequence[ReleasedTable], covariates: dict[str, dict[str, float | str]]
) -> dict[str, Any]:
    """The covariate's likelihood-ratio test in the headline model, over every site that has it (withheld
    cells censored), beside the Wald tests of the normal-approximation regression of complete tables."""
    used = [t for t in released if name in covariates.get(t.site_id, {})]
    values = [covariates[t.site_id][name] for t in used]
    if len({type(v) for v in values}) > 1:
        return _not_estimated("mixes numbers and categories")
    columns = _columns(values) if used else None
    if columns is None:
        return _not_estimated("fewer than 2 categories among the sites")
    matrix, categories = columns
    labels = [name] if not categories else [f"{name} = {c} (vs {categories[0]})" for c in categories[1:]]
    return _attempt(headline_covariate_test, used, matrix, labels)


def _likelihood_ratio_line(name: str, fit: dict[str, Any]) -> str | None:
    test = fit.get("likelihood_ratio_test") if isinstance(fit, dict) else None
    if not isinstance(test, dict) or _number(test.get("statistic")) is None:
        return None
    return (
        f"Likelihood-ratio test of {name} in the headline model over {test['n_sites']} sites (withheld cells "
        f"censored): χ²({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.2g}"
    )


def further_results(
    tables: Sequence[SiteTable],
    pooled: dict[str, Any],
    covariates: dict[str, dict[str, float | str]] | None = None,
    integer_variables: frozenset[str] = frozenset(),
) -> dict[str, Any]:
    """The results listed in the module docstring, keyed as in ``federation analyze --json``.

    ``integer_variables``: model inputs that take whole numbers (subgroup bands read "36-47 months")."""
    out: dict[str, Any] = {}
    # Tiny matrices and many small fits: one BLAS thread is several times faster than many on a busy machine.
    with threadpool_limits(limits=1, user_api="blas"):
        for key, value in (
            ("agreement", _agreement(tables)),
            ("margin", _margin(tables)),
            ("likelihood_ratios", _likelihood_ratios(pooled)),
            ("small_site_effects", _small_site_effects(tables)),
            ("influence", _influence(tables)),
            ("subgroup_contrasts", _subgroup_contrasts(tables, integer_variables)),
            ("meta_regression", _meta_regression(tables, covariates)),
        ):
            if value is not None:
                out[key] = value
    return out


# --- terminal summary -------------------------------------------------------------------------------------------


def _interval(value: Any, digits: int = 3) -> str | None:
    if not isinstance(value, dict) or _number(value.get("estimate")) is None:
        return None
    low, high = _number(value.get("ci_low")), _number(value.get("ci_high"))
    if low is None or high is None:
        return f"{value['estimate']:.{digits}f}"
    return f"{value['estimate']:.{digits}f} (95% CI {low:.{digits}f} to {high:.{digits}f})"


def _why(value: Any) -> str:
    return f"not estimable: {value['reason']}" if isinstance(value, dict) and "reason" in value else "not estimable"


def summary_lines(result: dict[str, Any]) -> list[str]:
    """Lines for ``federation analyze`` (terminal) on the pooled results beyond the headline."""
    lines: list[str] = []
    discrimination = result.get("discrimination") or {}
    if discrimination:
        auc = _interval(discrimination.get("pooled_auc"))
        lines.append(f"AUC, site AUCs pooled on the logit scale: {auc or _why(discrimination.get('pooled_auc'))}")
        lines.extend(f"  {bounds}" for bounds in auc_bounds_lines(discrimination))
        roc = discrimination.get("summary_roc") or {}
        if _number(roc.get("area_under_curve")) is not None:
            low, high = roc["area_under_curve_ci_low"], roc["area_under_curve_ci_high"]
            lines.append(
                f"  {roc['area_under_curve_described']}: {roc['area_under_curve']:.3f} (95% CI {low:.3f} to {high:.3f})"
            )
        elif roc:
            lines.append(f"  summary ROC (multiple-threshold model): {_why(roc)}")
    ratios = result.get("likelihood_ratios")
    if isinstance(ratios, dict):
        if "diagnostic_odds_ratio" in ratios:
            lines.append(
                f"From the summary point of {ratios.get('from_model_described')}: "
                f"LR+ {_interval(ratios['likelihood_ratio_positive'], 2)}, "
                f"LR- {_interval(ratios['likelihood_ratio_negative'], 2)}, "
                f"DOR {_interval(ratios['diagnostic_odds_ratio'], 1)}"
            )
        else:
            lines.append(f"Likelihood ratios from the bivariate model: {_why(ratios)}")
    for pair in (result.get("agreement") or {}).values():
        kappa, discordance = _interval(pair["kappa"]), _interval(pair["discordance"])
        if kappa is None and discordance is None:
            lines.append(f"Agreement, {pair['label']}: {_why(pair['kappa'])}")
        else:
            lines.append(
                f"Agreement, {pair['label']}: pooled kappa {kappa or _why(pair['kappa'])}; "
                f"discordance {discordance or _why(pair['discordance'])}"
            )
    for band in (result.get("margin") or {}).get("bands", []):
        rate = band["error_rate"]
        lines.append(f"Margin band, {band['band']}: {_interval(rate) or _why(rate)}")
    paired = result.get("paired") or {}
    for key, label in (
        ("sensitivity_difference", "difference in sensitivity"),
        ("specificity_difference", "difference in specificity"),
        ("auc_difference", "difference in AUC"),
    ):
        if key in paired:
            lines.append(
                f"Paired comparison, {label} (model minus comparison): {_interval(paired[key]) or _why(paired[key])}"
            )
    deeks = result.get("small_site_effects")
    if isinstance(deeks, dict):
        test = deeks.get("test")
        if isinstance(test, dict):
            lines.append(
                f"Small-site effects (Deeks' test): slope {deeks['slope']:.2f}, t({test['df']}) = "
                f"{test['statistic']:.2f}, p = {test['p']:.3g}"
            )
        else:
            lines.append(f"Small-site effects (Deeks' test): {_why(deeks)}")
    influence = result.get("influence")
    if isinstance(influence, dict) and influence.get("most_influential"):
        lines.append(
            f"Leave-one-site-out refits of the headline model: largest change without {influence['most_influential']} "
            f"({influence['largest_change_logit']:.2f} on the logit scale)"
        )
    for variable, measures in (result.get("subgroup_contrasts") or {}).items():
        for value in measures.values():
            if isinstance(value, list):
                lines += [f"Within sites, {variable}: {c['sentence']}" for c in value]
    for name, fit in (result.get("meta_regression") or {}).items():
        likelihood_ratio = _likelihood_ratio_line(name, fit)
        if "effects" not in fit:
            lines.append(f"Meta-regression on {name}: {_why(fit)}")
            lines += [likelihood_ratio] if likelihood_ratio else []
            continue
        for effect in fit["effects"]:
            test = effect["covariate_test"]
            lines.append(
                f"Meta-regression on {effect['name']} over {fit['n_sites']} sites: logit sensitivity "
                f"{effect['logit_sensitivity']:+.2f}, logit specificity {effect['logit_specificity']:+.2f}; "
                f"joint Wald test χ²({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.2g}"
                + (" (exploratory: few sites)" if fit.get("caution") else "")
            )
        lines += [likelihood_ratio] if likelihood_ratio else []
    return lines
