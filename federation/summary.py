"""The terminal summary of a study: every result, in the order a validation paper reports them.

``federation analyze`` (without ``--json``) and ``federation demo`` print it. Sections, each shown when the
study has it, with pooled figures where the analysis pooled them and the sites' own values otherwise:

1. the 2×2 table at the model's threshold with the participant flow (the primary result), pooled
   sensitivity and specificity, likelihood ratios and the diagnostic odds ratio from the bivariate model,
   small-site effects and leave-one-site-out;
2. discrimination (ROC bands): each site's AUC, the pooled AUC and the pooled ROC;
3. calibration: observed:expected, calibration intercept and slope;
4. subgroups, one variable at a time in the order the request names them (age bands, subtypes, ...);
5. accuracy by score margin (how often calls close to the threshold are wrong);
6. agreement with a second reference standard (Cohen's kappa);
7. the paired comparison with a second model;
8. the meta-regression on site covariates, when the coordinator gave them.

A count a site did not release is shown as ``·`` (withheld by the site's disclosure control); ``—`` means
the quantity is not defined or not estimable.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from federation.labels import auc_bounds_lines
from federation.protocol.documents import calibration_intercept

from .protocol.words import NOT_DEFINED_MARK, POOLED_MODELS, WITHHELD_LEGEND, WITHHELD_MARK

__all__ = ["SECTION_ORDER", "format_summary", "format_table"]

SECTION_ORDER = ("primary", "roc", "calibration", "subgroups", "margin", "agreement", "paired")
WITHHELD = "·"
LEGEND = "· = withheld by the site's disclosure control; — = not defined or not estimable"
_RULE = "=" * 100


def _fmt(value: Any, digits: int = 3) -> str:
    if not isinstance(value, dict) or not _finite(value.get("estimate")):
        return "—"
    low, high = value.get("ci_low"), value.get("ci_high")
    if _finite(low) and _finite(high):
        return f"{value['estimate']:.{digits}f} ({low:.{digits}f}–{high:.{digits}f})"
    return f"{value['estimate']:.{digits}f}"


def _finite(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _num(value: Any, digits: int = 3) -> str:
    return f"{value:.{digits}f}" if _finite(value) else "—"


def _count(value: Any) -> str:
    return WITHHELD if value is None else str(value)


def _heading(title: str) -> list[str]:
    return ["", title, "-" * len(title)]


def format_table(result: dict) -> str:
    """The per-site accuracy table, its columns grouped by the reference standard as the report's flow boxes
    are: with the condition (screen +, screen −), without the condition (screen +, screen −), then
    sensitivity and specificity."""
    lines = [f"Study {result['study_id']}", ""]
    counts = 10
    group = f"{'':<24}{'with the condition':^{2 * counts}}  {'without the condition':^{2 * counts}}"
    header = (
        f"{'site':<24}{'screen +':>{counts}}{'screen −':>{counts}}  {'screen +':>{counts}}{'screen −':>{counts}}"
        f"  {'sensitivity (95% CI)':<24}{'specificity (95% CI)':<24}"
    )
    lines += [group, header, "-" * len(header)]
    shown_withheld = False
    width = 24 + 4 * counts + 4
    for site in result["sites"]:
        cells = []
        for pair in (("tp", "fn"), ("fp", "tn")):
            shown = "".join(f"{(WITHHELD_MARK if site[c] is None else site[c]):>{counts}}" for c in pair)
            cells.append(shown)
        shown_withheld = shown_withheld or any(site[c] is None for c in ("tp", "fn", "fp", "tn"))
        lines.append(
            f"{site['site_id']:<24}{'  '.join(cells)}  {_fmt(site['sensitivity']):<24}{_fmt(site['specificity']):<24}"
        )
    pooled = result["pooled"]
    lines.append("-" * len(header))
    label = f"pooled: {POOLED_MODELS['pooled']} ({len(pooled.get('sites_pooled', []))} sites)"
    lines.append(f"{label:<{width}}{_fmt(pooled['sensitivity']):<24}{_fmt(pooled['specificity']):<24}")
    univariate = (pooled.get("sensitivity_analyses") or {}).get("univariate") or {}
    if univariate.get("sensitivity"):
        label = f"  {POOLED_MODELS['univariate']} ({len(univariate.get('sites_pooled', []))} sites)"
        lines.append(f"{label:<{width}}{_fmt(univariate['sensitivity']):<24}{_fmt(univariate['specificity']):<24}")
    for name, reason in (pooled.get("not_estimable") or {}).items():
        lines.append(f"{name.replace('_', ' ')}: {reason}")
    parts = [
        f"tau² logit {name} {pooled[f'tau2_logit_{name}']:.3f}"
        for name in ("sensitivity", "specificity")
        if _finite(pooled.get(f"tau2_logit_{name}"))
    ]
    if parts:
        lines.append("between-site variation: " + "; ".join(parts))
    for entry in pooled["sites_not_pooled"]:
        lines.append(f"not pooled: {entry['site_id']} ({entry['reason']})")
    for entry in univariate.get("sites_not_pooled", []):
        lines.append(f"left out of the univariate sensitivity analysis: {entry['site_id']} ({entry['reason']})")
    lines += cut_back_lines(result["sites"])
    legend = [WITHHELD_LEGEND] if shown_withheld else []
    if any(site.get(m) is None for site in result["sites"] for m in ("sensitivity", "specificity")):
        legend.append(f"{NOT_DEFINED_MARK} not defined from what the site released")
    lines += legend
    lines.append(
        "pooled: every site, each withheld count within the range its release allows; 95% profile-likelihood intervals"
    )
    return "\n".join(line.rstrip() for line in lines)


def cut_back_lines(sites: list[dict]) -> list[str]:
    """What each site cut back so that its primary table could be released: one line per site naming each
    analysis and what was done, and the rule once when every site gives the same (never a count)."""
    cuts = [(site["site_id"], cut) for site in sites for cut in site.get("cut_back") or []]
    if not cuts:
        return []
    rules = {str(cut.get("rule", "")) for _, cut in cuts}
    shared = rules.pop() if len(rules) == 1 else None
    lines = ["cut back so that each site's primary 2x2 table could be released" + (f" ({shared}):" if shared else ":")]
    for site_id in dict.fromkeys(site for site, _ in cuts):
        items = [
            f"{cut.get('analysis', '?')}: {cut.get('action', '')}" + ("" if shared else f" ({cut.get('rule', '')})")
            for site, cut in cuts
            if site == site_id
        ]
        lines.append(f"  {site_id:<24} " + "; ".join(items))
    return lines


def _primary_extras(result: dict) -> list[str]:
    """Likelihood ratios and DOR from the bivariate model, small-site effects and leave-one-site-out."""
    lines: list[str] = []
    ratios = result.get("likelihood_ratios")
    if isinstance(ratios, dict):
        if "diagnostic_odds_ratio" in ratios:
            model = POOLED_MODELS.get(str(ratios.get("from_model")), ratios.get("from_model"))
            lines.append(
                f"from the bivariate summary point ({model}): "
                f"LR+ {_fmt(ratios.get('likelihood_ratio_positive'), 2)}, "
                f"LR− {_fmt(ratios.get('likelihood_ratio_negative'), 2)}, "
                f"DOR {_fmt(ratios.get('diagnostic_odds_ratio'), 1)}"
            )
        elif ratios.get("reason"):
            lines.append(f"likelihood ratios from the bivariate model: not estimable: {ratios['reason']}")
    deeks = result.get("small_site_effects")
    if isinstance(deeks, dict):
        test = deeks.get("test")
        if isinstance(test, dict) and _finite(test.get("p")):
            lines.append(
                f"small-site effects (Deeks' test): slope {_num(deeks.get('slope'), 2)}, t({test.get('df')}) = "
                f"{_num(test.get('statistic'), 2)}, p = {test['p']:.3g}"
            )
        elif deeks.get("reason"):
            lines.append(f"small-site effects (Deeks' test): not estimable: {deeks['reason']}")
    influence = result.get("influence")
    if isinstance(influence, dict) and influence.get("most_influential"):
        lines.append(
            f"leave-one-site-out refits of the headline model: the largest change is without "
            f"{influence['most_influential']} "
            f"({_num(influence.get('largest_change_logit'), 2)} on the logit scale)"
        )
    return lines


def _flow_lines(result: dict) -> list[str]:
    lines = ["participant flow (records read, excluded, analysed with / without the condition):"]
    for site in result["sites"]:
        flow = site.get("flow") if isinstance(site.get("flow"), dict) else {}
        excluded = flow.get("excluded") if isinstance(flow.get("excluded"), dict) else {}
        reasons = ", ".join(f"{name.replace('_', ' ')} {_count(n)}" for name, n in excluded.items() if n != 0)
        lines.append(
            f"  {site['site_id']:<24} read {_count(flow.get('read'))}, excluded: {reasons or 'none'}; analysed "
            f"{_count(flow.get('analysed'))} ({_count(flow.get('analysed_positive'))} with / "
            f"{_count(flow.get('analysed_negative'))} without the condition)"
        )
    return lines


def _pooled_line(label: str, value: Any, digits: int = 3) -> str | None:
    """``label: estimate (CI), prediction interval, sites`` for a pooled result, or why it was not pooled."""
    if not isinstance(value, dict):
        return None
    if not _finite(value.get("estimate")):
        reason = value.get("reason")
        return f"  {label}: not estimable" + (f": {reason}" if reason else "")
    text = f"  {label}: {_fmt(value, digits)}"
    if _finite(value.get("pi_low")) and _finite(value.get("pi_high")):
        text += f", prediction interval {value['pi_low']:.{digits}f}–{value['pi_high']:.{digits}f}"
    inner = value.get("pooled") if isinstance(value.get("pooled"), dict) else value
    if _finite(inner.get("i2")):
        text += f", I² {100 * inner['i2']:.0f}%"
    sites = value.get("sites_pooled")
    if isinstance(sites, list):
        text += f" ({len(sites)} sites)"
    return text


def _site_value_lines(sites: Mapping[str, dict], name: str, render: Any) -> list[str]:
    lines = []
    for site_id, sections in sites.items():
        section = sections.get(name)
        if section is not None:
            lines.append(f"  {site_id:<24} {render(section)}")
    return lines


def _roc(result: dict, sites: Mapping[str, dict]) -> list[str]:
    discrimination = result.get("discrimination")
    lines = _site_value_lines(
        sites,
        "roc",
        lambda r: f"AUC {_num(r.get('auc'))} (SE {_num(r.get('auc_se'))}), {len(r.get('bands') or [])} score bands",
    )
    if isinstance(discrimination, dict):
        lines.append(_pooled_line("pooled AUC (random effects, logit scale)", discrimination.get("pooled_auc")) or "")
        lines.extend(f"  {bounds}" for bounds in auc_bounds_lines(discrimination))
        roc = discrimination.get("summary_roc")
        if isinstance(roc, dict) and _finite(roc.get("area_under_curve")):
            low, high = roc.get("area_under_curve_ci_low"), roc.get("area_under_curve_ci_high")
            interval = f" ({low:.3f}–{high:.3f})" if _finite(low) and _finite(high) else ""
            what = roc.get("area_under_curve_described") or "area under the summary ROC"
            lines.append(f"  {what}: {roc['area_under_curve']:.3f}{interval}")
        elif isinstance(roc, dict) and roc.get("reason"):
            lines.append(f"  summary ROC: not estimable: {roc['reason']}")
    return [line for line in lines if line]


def _calibration(result: dict, sites: Mapping[str, dict]) -> list[str]:
    lines = _site_value_lines(
        sites,
        "calibration",
        lambda c: (
            f"O:E {_num(c.get('observed_expected_ratio'), 2)}, calibration intercept "
            f"{_num(calibration_intercept(c), 2)}, slope {_num(c.get('slope'), 2)}"
        ),
    )
    pooled = result.get("calibration")
    if isinstance(pooled, dict):
        for key, label in (
            ("observed_expected", "pooled O:E"),
            ("calibration_intercept", "pooled calibration intercept"),
            ("calibration_slope", "pooled calibration slope"),
        ):
            line = _pooled_line(label, pooled.get(key), 2)
            if line:
                lines.append(line)
    return lines


def _back(value: Any, scale: str) -> Any:
    if not _finite(value):
        return None
    if scale == "logit":
        return 1.0 / (1.0 + math.exp(-value))
    if scale == "log":
        return math.exp(value)
    return value


def _subgroup_lines(variable: str, measures: dict) -> list[str]:
    lines: list[str] = []
    for measure, entry in measures.items():
        if not isinstance(entry, dict):
            continue
        scale = str(entry.get("scale", "identity"))
        levels = entry.get("subgroups") if isinstance(entry.get("subgroups"), list) else []
        name = {"auc": "AUC"}.get(measure, measure)
        if not levels:
            lines.append(f"  {name}: not estimable: {entry.get('reason', 'no level had usable estimates')}")
            continue
        lines.append(f"  {name} (pooled within each level, random effects):")
        for level in levels:
            pooled = level.get("pooled") if isinstance(level.get("pooled"), dict) else None
            label = str(level.get("subgroup"))
            if pooled is None or not _finite(pooled.get("estimate")):
                lines.append(f"    {label:<22} not pooled: {level.get('reason') or 'no usable estimate'}")
                continue
            shown = {k: _back(pooled.get(k), scale) for k in ("estimate", "ci_low", "ci_high")}
            lines.append(f"    {label:<22} {_fmt(shown)} ({len(level.get('sites', []))} sites)")
        between = entry.get("between_subgroups") if isinstance(entry.get("between_subgroups"), dict) else {}
        if _finite(between.get("p")):
            df = between.get("df")
            df_text = ", ".join(str(d) for d in df) if isinstance(df, list | tuple) else str(df)
            symbol = "F" if between.get("distribution") == "F" else "χ²"
            statistic = between.get("statistic")
            lines.append(
                f"    difference between subgroups: {symbol}({df_text}) = {_num(statistic, 2)}, p = {between['p']:.3g}"
            )
    return lines


def _contrast_lines(contrasts: Any) -> list[str]:
    """Within-site contrasts between levels (federation.further_analysis), in the sentences it wrote."""
    lines: list[str] = []
    for measure, value in contrasts.items() if isinstance(contrasts, dict) else []:
        if isinstance(value, list):
            lines += [f"  within sites: {c['sentence']}" for c in value if isinstance(c, dict) and c.get("sentence")]
        elif isinstance(value, dict) and value.get("reason"):
            lines.append(f"  within-site contrast of {measure}: not estimable: {value['reason']}")
    return lines


def _margin_site(tables: Any) -> str:
    if not isinstance(tables, list) or not tables or not isinstance(tables[0], dict):
        return "—"
    table = tables[0]
    parts = []
    for side, label in (("called_negative", "below"), ("called_positive", "above")):
        rows = table.get(side) if isinstance(table.get(side), list) else []
        if rows:
            near = rows[0]
            to = near.get("distance_to")
            width = f"within {to:g}" if _finite(to) else "all"
            parts.append(
                f"{label} ({width}): wrong {_count(near.get('wrong'))} of correct {_count(near.get('correct'))}"
            )
    return "; ".join(parts) or "—"


def _agreement_site(section: Any) -> str:
    if not isinstance(section, dict) or not section.get("available"):
        reason = section.get("reason") if isinstance(section, dict) else None
        return f"— ({reason})" if reason else "—"
    tables = section.get("tables") if isinstance(section.get("tables"), list) else []
    if not tables:
        return "—"
    pairs = tables[0].get("pairs", {}) if isinstance(tables[0], dict) else {}
    texts = []
    for pair, label in (("reference_reference2", "reference vs second"), ("model_reference", "model vs reference")):
        value = pairs.get(pair) if isinstance(pairs, dict) else None
        if isinstance(value, dict):
            kappa, se = value.get("kappa"), value.get("kappa_se")
            if _finite(kappa):
                texts.append(f"kappa {label} {kappa:.2f}" + (f" (SE {se:.2f})" if _finite(se) else ""))
            else:
                texts.append(f"kappa {label} —")
    return ", ".join(texts) or "—"


def _margin_pooled(pooled: Any) -> list[str]:
    """The pooled error rate in each margin band (federation.further_analysis)."""
    lines: list[str] = []
    bands = pooled.get("bands") if isinstance(pooled, dict) else None
    for band in bands if isinstance(bands, list) else []:
        if isinstance(band, dict):
            line = _pooled_line(f"pooled {band.get('band')}", band.get("error_rate"))
            if line:
                lines.append(line)
    if isinstance(pooled, dict) and not bands and pooled.get("reason"):
        lines.append(f"  pooled error rate by band: not estimable: {pooled['reason']}")
    return lines


def _agreement_pooled(pooled: Any) -> list[str]:
    """Pooled kappa and discordance for each pair of raters (federation.further_analysis)."""
    lines: list[str] = []
    for pair in pooled.values() if isinstance(pooled, dict) else []:
        if not isinstance(pair, dict):
            continue
        label = pair.get("label", "")
        for key, what in (("kappa", "pooled kappa"), ("discordance", "pooled discordance")):
            line = _pooled_line(f"{what}, {label}", pair.get(key), 2)
            if line:
                lines.append(line)
    return lines


def _paired(result: dict, sites: Mapping[str, dict]) -> list[str]:
    lines = _site_value_lines(
        sites,
        "paired",
        lambda p: (
            f"AUC model {_num(p.get('auc_model'))}, comparison {_num(p.get('auc_compare'))}, "
            f"difference {_num(p.get('auc_difference'))} (SE {_num(p.get('auc_difference_se'))})"
        ),
    )
    pooled = result.get("paired")
    if isinstance(pooled, dict):
        for key, label in (
            ("sensitivity_difference", "pooled difference in sensitivity (model minus comparison)"),
            ("specificity_difference", "pooled difference in specificity (model minus comparison)"),
            ("auc_difference", "pooled difference in AUC (model minus comparison)"),
        ):
            line = _pooled_line(label, pooled.get(key))
            if line:
                lines.append(line)
    return lines


def _likelihood_ratio_line(name: str, fit: object) -> str | None:
    test = fit.get("likelihood_ratio_test") if isinstance(fit, dict) else None
    if not isinstance(test, dict) or not _finite(test.get("statistic")):
        return None
    return (
        f"  {name}, likelihood-ratio test in the headline model (k = {test.get('n_sites')}, withheld cells "
        f"censored): χ²({test.get('df')}) = {_num(test.get('statistic'), 2)}, "
        + (f"p = {test['p']:.2g}" if _finite(test.get("p")) else "p —")
    )


def _meta_regression_lines(regression: dict) -> list[str]:
    lines: list[str] = []
    for name, fit in regression.items():
        likelihood_ratio = _likelihood_ratio_line(name, fit)
        if not isinstance(fit, dict) or "effects" not in fit:
            reason = fit.get("reason") if isinstance(fit, dict) else None
            lines.append(f"  {name}: not estimable" + (f": {reason}" if reason else ""))
            lines += [likelihood_ratio] if likelihood_ratio else []
            continue
        for effect in fit["effects"]:
            test = effect.get("covariate_test") or {}
            lines.append(
                f"  {effect.get('name')} (k = {fit.get('n_sites')}): logit sensitivity "
                f"{_num(effect.get('logit_sensitivity'), 2)}, logit specificity "
                f"{_num(effect.get('logit_specificity'), 2)}; Wald χ²({test.get('df')}) = "
                f"{_num(test.get('statistic'), 2)}, " + (f"p = {test['p']:.2g}" if _finite(test.get("p")) else "p —")
            )
        lines += [likelihood_ratio] if likelihood_ratio else []
    return lines


def format_summary(result: dict, site_sections: Mapping[str, dict] | None = None) -> str:
    """Every result of ``result`` (``federation analyze --json``) in :data:`SECTION_ORDER`.

    ``site_sections`` maps each site to its release's further sections (``roc``, ``calibration``, ``margin``,
    ``agreement``, ``paired``, ...), for the per-site values the analysis does not repeat.
    """
    sites = dict(site_sections or {})
    lines = [format_table(result)]
    lines += _primary_extras(result)
    lines += _flow_lines(result)
    sections: list[tuple[str, list[str]]] = []
    if "discrimination" in result or any("roc" in s for s in sites.values()):
        sections.append(("Discrimination (ROC from score bands)", _roc(result, sites)))
    if "calibration" in result or any("calibration" in s for s in sites.values()):
        sections.append(("Calibration", _calibration(result, sites)))
    subgroups = result.get("subgroups")
    contrasts = result.get("subgroup_contrasts") if isinstance(result.get("subgroup_contrasts"), dict) else {}
    if isinstance(subgroups, dict):
        for variable, measures in subgroups.items():
            if isinstance(measures, dict):
                body = _subgroup_lines(variable, measures) + _contrast_lines(contrasts.get(variable))
                sections.append((f"Subgroups by {variable}", body))
    for name, title, render, pooled_lines in (
        ("margin", "Accuracy by score margin (nearest bands to the threshold)", _margin_site, _margin_pooled),
        ("agreement", "Agreement with a second reference standard", _agreement_site, _agreement_pooled),
    ):
        pooled = result.get(name)
        if pooled is None and not any(name in s for s in sites.values()):
            continue
        sections.append((title, _site_value_lines(sites, name, render) + pooled_lines(pooled)))
    if "paired" in result or any("paired" in s for s in sites.values()):
        sections.append(("Paired comparison with the second model", _paired(result, sites)))
    regression = result.get("meta_regression")
    if isinstance(regression, dict) and regression:
        sections.append(("Meta-regression on site covariates", _meta_regression_lines(regression)))
    for title, body in sections:
        lines += _heading(title)
        lines += body or ["  no results in the store"]
    lines += ["", LEGEND]
    return "\n".join(line.rstrip() for line in lines)
