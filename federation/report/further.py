"""Sentences for the pooled results beyond the headline (:mod:`federation.further_analysis`), as computed.

Each further-analysis section of the report opens with what the analysis pooled, in words a methods
section would use: the estimate, its 95% interval, the sites pooled and the test with its distribution and
degrees of freedom. Nothing here computes a statistic; it reads ``federation analyze --json``.
"""

from __future__ import annotations

from typing import Any

from federation.labels import auc_bounds_lines

from .html import esc

__all__ = ["FURTHER_SECTIONS", "further_paragraph"]

# Report sections for analysis keys that have no request name of their own: title and what a reader learns.
FURTHER_SECTIONS = {
    "likelihood_ratios": (
        "Likelihood ratios and diagnostic odds ratio",
        "Derived from the bivariate model's summary sensitivity and specificity (Zwinderman & Bossuyt 2008), "
        "so they always describe a sensitivity and specificity that the data support; never pooled site by site.",
    ),
    "small_site_effects": (
        "Small-site effects (Deeks' test)",
        "Whether smaller sites report systematically different accuracy: regression of the log diagnostic odds "
        "ratio on 1/√(effective sample size), weighted by it (Deeks, Macaskill & Irwig 2005).",
    ),
    "influence": (
        "Leave-one-site-out influence",
        "The headline model (the bivariate binomial GLMM over every site, withheld cells censored) refitted "
        "without each site in turn: which site moves the summary point most.",
    ),
    "subgroup_contrasts": (
        "Subgroup differences within sites",
        "Each subgroup level against the reference level, estimated inside each site and then pooled by random "
        "effects, so a difference between subgroups is not confounded by differences between sites.",
    ),
    "meta_regression": (
        "Meta-regression on site covariates",
        "Bivariate random-effects meta-regression of sensitivity and specificity on one site covariate at a "
        "time (van Houwelingen, Arends & Stijnen 2002): does accuracy change with the setting, prevalence or "
        "case mix? Wald tests from the normal approximation of the complete tables, and a likelihood-ratio "
        "test from the headline model with and without the covariate over every site (withheld cells censored).",
    ),
}


def _num(value: Any) -> float | None:
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


def _interval(value: Any, digits: int = 3) -> str | None:
    if not isinstance(value, dict) or _num(value.get("estimate")) is None:
        return None
    low, high = _num(value.get("ci_low")), _num(value.get("ci_high"))
    text = f"{value['estimate']:.{digits}f}"
    if low is not None and high is not None:
        text += f" (95% CI {low:.{digits}f} to {high:.{digits}f})"
    pooled = value.get("pooled")
    if isinstance(pooled, dict) and isinstance(pooled.get("n_studies"), int):
        text += f", {pooled['n_studies']} sites"
        i2 = _num(pooled.get("i2"))
        if i2 is not None:
            text += f", I² {100 * i2:.0f}%"
        if _num(value.get("pi_low")) is not None and _num(value.get("pi_high")) is not None:
            text += f", 95% prediction interval {value['pi_low']:.{digits}f} to {value['pi_high']:.{digits}f}"
    return text


def _why(value: Any) -> str:
    reason = value.get("reason") if isinstance(value, dict) else None
    return f"not estimable: {reason}" if reason else "not estimable"


def _items(lines: list[str]) -> str:
    if not lines:
        return ""
    return '<ul class="pooled-sentences">' + "".join(f"<li>{esc(line)}</li>" for line in lines) + "</ul>"


def _discrimination(analysis: dict[str, Any]) -> list[str]:
    found = analysis.get("discrimination") or {}
    lines = []
    if "pooled_auc" in found:
        auc = found["pooled_auc"]
        lines.append(
            "AUC pooled on the logit scale from each site's own AUC (Debray et al. 2017): "
            + (_interval(auc) or _why(auc))
        )
    lines.extend(auc_bounds_lines(found))
    roc = found.get("summary_roc")
    if isinstance(roc, dict):
        if _num(roc.get("area_under_curve")) is not None:
            described = str(roc["area_under_curve_described"])
            low, high = roc["area_under_curve_ci_low"], roc["area_under_curve_ci_high"]
            lines.append(
                f"{described[:1].upper()}{described[1:]}: {roc['area_under_curve']:.3f} (95% CI {low:.3f} to "
                f"{high:.3f}); {len(roc.get('sites_pooled', []))} sites, {roc.get('n_points')} operating points at "
                "their own band edges."
            )
        else:
            lines.append("Summary ROC (multiple-threshold model): " + _why(roc))
    return lines


def _agreement(analysis: dict[str, Any]) -> list[str]:
    lines = []
    for pair in (analysis.get("agreement") or {}).values():
        if not isinstance(pair, dict):
            continue
        kappa, discordance = _interval(pair.get("kappa")), _interval(pair.get("discordance"))
        lines.append(
            f"{str(pair.get('label', '')).capitalize()}: pooled Cohen's kappa {kappa or _why(pair.get('kappa'))}; "
            f"share of participants on whom they disagree {discordance or _why(pair.get('discordance'))}."
        )
    return lines


def _margin(analysis: dict[str, Any]) -> list[str]:
    margin = analysis.get("margin") or {}
    lines = [
        f"{str(band.get('band', '')).capitalize()}: {_interval(band.get('error_rate')) or _why(band.get('error_rate'))}"
        for band in margin.get("bands", [])
        if isinstance(band, dict)
    ]
    if lines and margin.get("note"):
        lines.append(str(margin["note"]).capitalize() + ".")
    return lines


def _paired(analysis: dict[str, Any]) -> list[str]:
    paired = analysis.get("paired") or {}
    lines = []
    for key, label in (
        ("sensitivity_difference", "Difference in sensitivity"),
        ("specificity_difference", "Difference in specificity"),
        ("auc_difference", "Difference in AUC"),
    ):
        if key in paired:
            lines.append(
                f"{label}, model minus comparison, pooled across sites: "
                + (_interval(paired[key]) or _why(paired[key]))
            )
    return lines


def _ratios(analysis: dict[str, Any]) -> list[str]:
    ratios = analysis.get("likelihood_ratios")
    if not isinstance(ratios, dict):
        return []
    if "diagnostic_odds_ratio" not in ratios:
        return ["Likelihood ratios: " + _why(ratios)]
    return [
        f"Positive likelihood ratio {_interval(ratios['likelihood_ratio_positive'], 2)}.",
        f"Negative likelihood ratio {_interval(ratios['likelihood_ratio_negative'], 2)}.",
        f"Diagnostic odds ratio {_interval(ratios['diagnostic_odds_ratio'], 1)}.",
        f"From the summary point of {ratios.get('from_model_described', ratios.get('from_model'))}; "
        f"{ratios.get('method')}.",
    ]


def _deeks(analysis: dict[str, Any]) -> list[str]:
    deeks = analysis.get("small_site_effects")
    if not isinstance(deeks, dict):
        return []
    test = deeks.get("test")
    if not isinstance(test, dict):
        return ["Deeks' test: " + _why(deeks)]
    return [
        f"Slope {deeks['slope']:.2f} (SE {deeks['slope_se']:.2f}) over {len(deeks.get('sites_pooled', []))} sites: "
        f"t({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.3g}"
        + ("; p < 0.10 suggests small-site effects (Deeks et al. 2005)." if test["p"] < 0.10 else ".")
    ]


def _influence(analysis: dict[str, Any]) -> list[str]:
    influence = analysis.get("influence")
    if not isinstance(influence, dict):
        return []
    if "omitted" not in influence:
        return ["Leave-one-site-out: " + _why(influence)]
    lines = []
    for row in influence["omitted"]:
        sens, spec = row.get("sensitivity"), row.get("specificity")
        if isinstance(sens, dict) and isinstance(spec, dict):
            lines.append(f"Without {row['site_id']}: sensitivity {_interval(sens)}, specificity {_interval(spec)}.")
        else:
            lines.append(f"Without {row['site_id']}: not refitted ({row.get('reason')}).")
    if influence.get("most_influential"):
        lines.append(
            f"Largest change: without {influence['most_influential']} "
            f"({influence['largest_change_logit']:.2f} on the logit scale)."
        )
    return lines


def _contrasts(analysis: dict[str, Any]) -> list[str]:
    lines = []
    for variable, measures in (analysis.get("subgroup_contrasts") or {}).items():
        for measure, value in measures.items():
            if isinstance(value, list):
                lines += [f"{variable}: {c['sentence']}." for c in value if isinstance(c, dict)]
            else:
                lines.append(f"{variable}, {measure}: {_why(value)}")
    return lines


def _likelihood_ratio(name: str, fit: Any) -> str | None:
    test = fit.get("likelihood_ratio_test") if isinstance(fit, dict) else None
    if not isinstance(test, dict) or "statistic" not in test:
        return None
    return (
        f"{name}, likelihood-ratio test in the headline model ({test['n_sites']} sites, withheld cells censored): "
        f"chi-squared({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.3g}."
    )


def _regression(analysis: dict[str, Any]) -> list[str]:
    lines = []
    for name, fit in (analysis.get("meta_regression") or {}).items():
        likelihood_ratio = _likelihood_ratio(name, fit)
        if not isinstance(fit, dict) or "effects" not in fit:
            lines.append(f"{name}: {_why(fit)}")
            lines += [likelihood_ratio] if likelihood_ratio else []
            continue
        for effect in fit["effects"]:
            test = effect["covariate_test"]
            lines.append(
                f"{effect['name']} ({fit.get('source')}, {fit['n_sites']} sites): logit sensitivity "
                f"{effect['logit_sensitivity']:+.2f} (95% CI {effect['logit_sensitivity_ci_low']:+.2f} to "
                f"{effect['logit_sensitivity_ci_high']:+.2f}), logit specificity {effect['logit_specificity']:+.2f} "
                f"(95% CI {effect['logit_specificity_ci_low']:+.2f} to {effect['logit_specificity_ci_high']:+.2f}); "
                f"joint Wald test chi-squared({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.3g}"
                + (f"; {fit['caution']}." if fit.get("caution") else ".")
            )
        lines += [likelihood_ratio] if likelihood_ratio else []
        heterogeneity = fit.get("residual_heterogeneity") or {}
        if heterogeneity:
            lines.append(
                f"Residual heterogeneity after {name}: Q({heterogeneity['df']}) = {heterogeneity['q']:.2f}, "
                f"p = {heterogeneity['p']:.3g}."
            )
    return lines


_BUILDERS = {
    "roc": _discrimination,
    "agreement": _agreement,
    "margin": _margin,
    "paired": _paired,
    "likelihood_ratios": _ratios,
    "small_site_effects": _deeks,
    "influence": _influence,
    "subgroup_contrasts": _contrasts,
    "meta_regression": _regression,
}


def further_paragraph(analysis: dict[str, Any], name: str) -> str:
    """The pooled results of section ``name`` as a list of sentences (empty when there are none)."""
    build = _BUILDERS.get(name)
    if build is None:
        return ""
    lines = build(analysis)
    if not lines:
        return ""
    return '<div class="pooled"><p><strong>Pooled across sites, as computed:</strong></p>' + _items(lines) + "</div>"
