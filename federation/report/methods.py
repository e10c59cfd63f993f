"""The Methods paragraph, written from what was actually run, and the references it cites.

The text is assembled from the analysis JSON (its method strings, the sites pooled and not pooled, any
continuity correction), the stored requests (analyses and thresholds asked for), the bundle manifest (model
format and score) and the site policies in the releases (minimum cell size). A reference is listed only when
the matching method appears in what was run.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from typing import Any

from .html import esc
from .inputs import ReportInputs

__all__ = ["REFERENCES", "cautions_section", "methods_section", "methods_text"]

# (pattern searched in the method strings the analysis reports, reference). Order is the citation order.
REFERENCES: tuple[tuple[str, str], ...] = (
    (
        "stard",
        "Bossuyt PM, Reitsma JB, Bruns DE, et al. STARD 2015: an updated list of essential items for "
        "reporting diagnostic accuracy studies. BMJ 2015;351:h5527.",
    ),
    (
        "wilson",
        "Wilson EB. Probable inference, the law of succession, and statistical inference. J Am Stat Assoc "
        "1927;22:209–212.",
    ),
    (
        "wilson",
        "Newcombe RG. Two-sided confidence intervals for the single proportion: comparison of seven "
        "methods. Stat Med 1998;17:857–872.",
    ),
    (
        "clopper",
        "Clopper CJ, Pearson ES. The use of confidence or fiducial limits illustrated in the case of the "
        "binomial. Biometrika 1934;26:404–413.",
    ),
    (
        "dersimonian|\\bdl\\b",
        "DerSimonian R, Laird N. Meta-analysis in clinical trials. Control Clin Trials 1986;7:177–188.",
    ),
    (
        "reml|restricted maximum",
        "Viechtbauer W. Bias and efficiency of meta-analytic variance estimators in the "
        "random-effects model. J Educ Behav Stat 2005;30:261–293.",
    ),
    (
        "paule|\\bpm\\b",
        "Paule RC, Mandel J. Consensus values and weighting factors. J Res Natl Bur Stand 1982;87:377–385.",
    ),
    (
        "hartung|knapp|hksj",
        "Hartung J, Knapp G. A refined method for the meta-analysis of controlled clinical "
        "trials with binary outcome. Stat Med 2001;20:3875–3889.",
    ),
    (
        "hartung|knapp|hksj",
        "Sidik K, Jonkman JN. A simple confidence interval for meta-analysis. Stat Med 2002;21:3153–3159.",
    ),
    (
        "i2|i²|heterogeneity",
        "Higgins JPT, Thompson SG, Deeks JJ, Altman DG. Measuring inconsistency in "
        "meta-analyses. BMJ 2003;327:557–560.",
    ),
    (
        "prediction",
        "Higgins JPT, Thompson SG, Spiegelhalter DJ. A re-evaluation of random-effects meta-analysis. "
        "J R Stat Soc A 2009;172:137–159.",
    ),
    (
        "knapp|hksj|hartung",
        "Knapp G, Hartung J. Improved tests for a random effects meta-regression with a single covariate. "
        "Stat Med 2003;22:2693–2710.",
    ),
    (
        "steinhauser|multiple-threshold",
        "Steinhauser S, Schumacher M, Rücker G. Modelling multiple thresholds in meta-analysis of diagnostic "
        "test accuracy studies. BMC Med Res Methodol 2016;16:97.",
    ),
    (
        "zwinderman",
        "Zwinderman AH, Bossuyt PM. We should not pool diagnostic likelihood ratios in systematic reviews. "
        "Stat Med 2008;27:687–697.",
    ),
    (
        "deeks' funnel",
        "Deeks JJ, Macaskill P, Irwig L. The performance of tests of publication bias and other sample size "
        "effects in systematic reviews of diagnostic test accuracy was assessed. J Clin Epidemiol "
        "2005;58:882–893.",
    ),
    (
        "cohen's kappa",
        "Sun S. Meta-analysis of Cohen's kappa. Health Serv Outcomes Res Methodol 2011;11:145–163.",
    ),
    (
        "leave-one-site-out",
        "Viechtbauer W, Cheung MWL. Outlier and influence diagnostics for meta-analysis. Res Synth Methods "
        "2010;1:112–125.",
    ),
    (
        "within sites",
        "Fisher DJ, Carpenter JR, Morris TP, Freeman SC, Tierney JF. Meta-analytical methods to identify who "
        "benefits most from treatments: daft, deluded, or deft approach? BMJ 2017;356:j573.",
    ),
    (
        "meta-regression",
        "van Houwelingen HC, Arends LR, Stijnen T. Advanced methods in meta-analysis: multivariate approach "
        "and meta-regression. Stat Med 2002;21:589–624.",
    ),
    (
        "bivariate|reitsma",
        "Reitsma JB, Glas AS, Rutjes AWS, et al. Bivariate analysis of sensitivity and "
        "specificity produces informative summary measures in diagnostic reviews. J Clin "
        "Epidemiol 2005;58:982–990.",
    ),
    (
        "glmm|binomial|chu",
        "Chu H, Cole SR. Bivariate meta-analysis of sensitivity and specificity with sparse "
        "data: a generalized linear mixed model approach. J Clin Epidemiol 2006;59:1331–1332.",
    ),
    (
        "sroc|hsroc|harbord",
        "Harbord RM, Deeks JJ, Egger M, Whiting P, Sterne JAC. A unification of models for "
        "meta-analysis of diagnostic accuracy studies. Biostatistics 2007;8:239–251.",
    ),
    (
        "delong|\\bauc\\b|roc",
        "DeLong ER, DeLong DM, Clarke-Pearson DL. Comparing the areas under two or more "
        "correlated receiver operating characteristic curves: a nonparametric approach. "
        "Biometrics 1988;44:837–845.",
    ),
    (
        "o:e|o_e|calibration|\\bauc\\b",
        "Debray TPA, Damen JAAG, Snell KIE, et al. A guide to systematic review "
        "and meta-analysis of prediction model performance. BMJ 2017;356:i6460.",
    ),
    (
        "calibration",
        "Van Calster B, McLernon DJ, van Smeden M, et al. Calibration: the Achilles heel of "
        "predictive analytics. BMC Med 2019;17:230.",
    ),
    ("kappa|agreement", "Cohen J. A coefficient of agreement for nominal scales. Educ Psychol Meas 1960;20:37–46."),
)


def _strings(value: Any, key: str = "") -> Iterator[str]:
    """Method strings and the keys they sit under, anywhere in the analysis JSON (site ids excluded)."""
    if isinstance(value, dict):
        for k, v in value.items():
            if k in ("site_id", "sites_pooled", "study_id", "reason"):
                continue
            yield str(k)
            yield from _strings(v, str(k))
    elif isinstance(value, list):
        for item in value:
            yield from _strings(item, key)
    elif isinstance(value, str) and key in ("method", "interval_method", "estimator", "model", "note"):
        yield value


def _site_interval_method(analysis: dict[str, Any]) -> str:
    for site in analysis["sites"]:
        entry = site.get("sensitivity")
        if isinstance(entry, dict) and isinstance(entry.get("method"), str):
            return entry["method"]
    # federation.analysis computes per-site intervals with federation.stats.wilson unless it says otherwise.
    return "Wilson score"


def _bivariate_sentences(pooled: dict[str, Any]) -> list[str]:
    out = []
    for name, value in pooled.items():
        if "bivariate" not in name or not isinstance(value, dict):
            continue
        if value.get("sensitivity") is None:
            if isinstance(value.get("reason"), str):
                out.append(f" The {esc(name.replace('_', ' '))} model was not fitted: {esc(value['reason'])}.")
            continue
        k = value.get("n_sites")
        k_text = f" (k = {k})" if isinstance(k, int) else ""
        out.append(
            f" Jointly, sensitivity and specificity were pooled by {esc(str(value.get('method', name)))}{k_text}"
        )
        if isinstance(value.get("sroc"), dict):
            out.append(", with the summary ROC curve, 95% confidence and prediction regions")
        out.append(".")
    return out


def _measure_sentences(analysis: dict[str, Any]) -> list[str]:
    """One sentence per pooled measure of the further analyses (AUC, O:E, calibration, subgroup differences)."""
    out = []
    for section, results in analysis.items():
        if section in ("study_id", "sites", "pooled") or not isinstance(results, dict):
            continue
        for value in results.values():
            if not isinstance(value, dict) or not isinstance(value.get("pooled"), dict):
                continue
            inner = value["pooled"]
            interval = {
                "hksj": "Hartung–Knapp–Sidik–Jonkman (variance factor truncated at 1, never narrower than Wald)",
                "wald": "Wald",
            }.get(str(inner.get("interval_method")))
            parts = [str(inner.get("method", "random effects"))]
            if interval:
                parts.append(f"{interval} interval")
            if isinstance(inner.get("n_studies"), int):
                parts.append(f"k = {inner['n_studies']}")
            measure, scale = esc(str(value.get("measure", "estimate"))), esc(str(value.get("scale", "")))
            where = "its own scale" if scale in ("identity", "") else f"the {scale} scale"
            out.append(f" The {measure} was pooled on {where} ({esc('; '.join(parts))}).")
    return out


def _further_sentences(analysis: dict[str, Any]) -> list[str]:
    """One sentence per further pooled method that was run (federation.further_analysis)."""
    out = []
    if isinstance((analysis.get("discrimination") or {}).get("summary_roc"), dict):
        out.append(
            " A summary ROC curve was fitted to every site's operating points at its own released band edges by a "
            "multiple-threshold random-effects model (Steinhauser et al. 2016); band counts were never summed "
            "across sites."
        )
    if analysis.get("agreement"):
        out.append(
            " Cohen's kappa (with the Fleiss, Cohen & Everitt standard error computed at each site) was pooled by "
            "random effects (Sun 2011), and the share of participants on whom two ratings disagree on the logit scale."
        )
    if analysis.get("margin"):
        out.append(" The error rate in each score-margin band was pooled on the logit scale, band by band.")
    if analysis.get("likelihood_ratios"):
        out.append(
            " Likelihood ratios and the diagnostic odds ratio were derived from the bivariate summary point "
            "(Zwinderman & Bossuyt 2008), not pooled site by site."
        )
    if analysis.get("small_site_effects"):
        out.append(" Small-site effects were tested with Deeks' funnel plot asymmetry test (Deeks et al. 2005).")
    if analysis.get("influence"):
        out.append(
            " Influence was examined by refitting the headline model (the bivariate binomial model with withheld "
            "cells censored) leaving out one site at a time."
        )
    if analysis.get("subgroup_contrasts"):
        out.append(
            " Subgroup differences were estimated within each site and then pooled by random effects, so that "
            "they are not confounded by differences between sites."
        )
    if analysis.get("meta_regression"):
        out.append(
            " Bivariate random-effects meta-regression examined one site covariate at a time (van Houwelingen "
            "et al. 2002), with Wald tests; with few sites these are exploratory. Each covariate was also tested "
            "by the likelihood ratio of the headline model fitted with and without it over every site that "
            "reported it, withheld cells censored (chi-squared on 2 df per covariate column)."
        )
    return out


def methods_text(inputs: ReportInputs) -> tuple[str, list[str]]:
    """The Methods paragraph (HTML) and the references it cites."""
    analysis = inputs.analysis
    pooled = analysis["pooled"]
    sites = analysis["sites"]
    manifest = inputs.manifest or {}
    model = manifest.get("model", {}) if isinstance(manifest.get("model"), dict) else {}
    score = manifest.get("score", {}) if isinstance(manifest.get("score"), dict) else {}
    thresholds = sorted({s["threshold"] for s in sites if isinstance(s.get("threshold"), (int, float))})
    ks = sorted({r.min_cell_size for r in inputs.releases if r.min_cell_size is not None})
    suppressed_sites = [s["site_id"] for s in sites if s.get("suppressed")]
    flow_suppressed = [s["site_id"] for s in sites if (s.get("flow") or {}).get("suppressed")]
    analyses = [a for a in inputs.requested_analyses]
    interval = _site_interval_method(analysis)
    text = [
        f"<p>The frozen model <code>{esc(manifest.get('name', 'model'))}</code> "
        f"({esc(model.get('format', 'unknown format'))}; score: {esc(score.get('kind', 'not stated'))}) was run at "
        f"each site by the site's own agent, on its own records, after checking the coordinator's signature on the "
        f"model bundle. A participant was screen-positive when the score was at or above the threshold "
        f"({esc(', '.join(f'{t:g}' for t in thresholds) or 'as stated in the bundle')}). The study asked each site "
        f"for: {esc(', '.join(analyses) or 'confusion')}. {len(inputs.releases)} signed release(s) from "
        f"{len(sites)} site(s) were ingested and verified against each site's enrolled key; this report checked "
        "every signature again.",
        f" Each site's sensitivity and specificity were estimated from its four-cell table with {esc(interval)} "
        "95% confidence intervals. Participant flow is reported in the shape of the STARD 2015 flow diagram.",
    ]
    method = pooled.get("method")
    if isinstance(method, str):
        text.append(f"</p><p>Sensitivity and specificity were pooled across sites by {esc(method)}")
        n_pooled = len(pooled.get("sites_pooled", []))
        text.append(f" (k = {n_pooled} site{'s' if n_pooled != 1 else ''}).")
        if pooled.get("sensitivity") is None:
            text.append(" No pooled estimate was formed: " + esc(pooled.get("note", "too few sites")) + ".")
        else:
            text.append(
                " Heterogeneity is reported as τ² on the log-odds scale"
                + (" and I²" if pooled.get("i2_logit_sensitivity") is not None else "")
            )
            has_pi = isinstance(pooled.get("sensitivity"), dict) and "pi_low" in pooled["sensitivity"]
            text.append(
                ", with 95% prediction intervals for a new site (t on k − 2 degrees of freedom with the random-effects "
                "standard error of the pooled mean; Higgins, Thompson & Spiegelhalter 2009), the one convention "
                "used for every prediction interval in this report."
                if has_pi
                else "."
            )
            if "referred to t" in str((pooled.get("sensitivity") or {}).get("method", "")):
                text.append(
                    " Their 95% confidence intervals are profile likelihood, the signed likelihood-ratio statistic "
                    "referred to t on k − 2 degrees of freedom rather than the normal distribution: maximum "
                    "likelihood estimates the between-site variances as if the pooled means were known, and in "
                    "the tool's simulation study the normal reference covered the truth in fewer than 93% of "
                    "consortia of 8 to 15 sites."
                )
    text += _bivariate_sentences(pooled)
    text += _measure_sentences(analysis)
    text += _further_sentences(analysis)
    corrected = pooled.get("continuity_corrected_sites") or []
    if corrected:
        text.append(f" For {len(corrected)} site(s) with a zero cell, 0.5 was added to every cell before pooling.")
    if ks:
        k_text = " or ".join(str(k) for k in ks)
        text.append(
            "</p><p>Disclosure control ran at each site before release: every released count is 0 or at least the "
            f"site's minimum cell size (k = {k_text}), and further cells were withheld where a withheld count could "
            "otherwise be worked out from released totals."
        )
    if suppressed_sites:
        dropped = [
            e["site_id"]
            for e in pooled.get("sites_not_pooled", [])
            if any(word in str(e.get("reason")) for word in ("withheld", "suppress"))
        ]
        handled = (
            f"{len(dropped)} site(s) with a withheld cell in the four-cell table were left out of the univariate "
            "pooled estimate, which can bias the pool toward larger sites"
            if dropped
            else f"{len(suppressed_sites)} site(s) with a withheld cell stayed in the pool"
        )
        if pooled.get("censored_sites"):
            handled = (
                f"{len(pooled['censored_sites'])} site(s) with a withheld cell stayed in the headline model: each "
                "contributed the probability of every table its release allows, given the rule that withheld each "
                "cell and the range the coordinator can work out from everything the site sent (interval "
                "censoring); the univariate sensitivity analysis left them out"
            )
        text.append(f" {handled}.")
    if flow_suppressed:
        text.append(f" Some flow counts were withheld at {len(flow_suppressed)} site(s) and are marked ·.")
    text.append(
        " No record left any site; the coordinator saw only the released counts and statistics listed in the "
        "provenance section, and every number in this report can be traced to them.</p>"
    )
    haystack = " ".join(_strings(analysis)).lower() + " stard wilson " + interval.lower() + " " + " ".join(analyses)
    cited = []
    for pattern, reference in REFERENCES:
        if re.search(pattern, haystack) and reference not in cited:
            cited.append(reference)
    return "".join(text), cited


def methods_section(inputs: ReportInputs) -> str:
    text, cited = methods_text(inputs)
    refs = "".join(f"<li>{esc(r)}</li>" for r in cited)
    return f'<section id="methods"><h2>Methods</h2>{text}<h3>References</h3><ol class="refs">{refs}</ol></section>'


def cautions_section() -> str:
    return (
        '<section id="cautions"><h2>Cautions</h2><div class="caution"><ul>'
        "<li><strong>Screening is not diagnosis.</strong> A screen-positive result means a full diagnostic "
        "assessment is warranted; a screen-negative result does not rule the condition out.</li>"
        "<li>These results do not replace clinical judgement, local regulation, or ethics approval. Each site's "
        "use of the model needs its own governance.</li>"
        "<li>Accuracy depends on the population screened: prevalence, case mix and setting differ between sites, "
        "and a new site may see accuracy anywhere within the prediction interval, not only near the pooled value."
        "</li>"
        "<li>A threshold chosen on these validation sites is optimistic for them. Setting the threshold is a "
        "policy decision made with clinicians, weighing missed cases against unnecessary assessments; the tool "
        "does not make it.</li>"
        "<li>Sites whose counts were withheld for privacy are usually the small ones; a pool without them "
        "describes the larger sites better than the smaller ones.</li>"
        "<li>Every figure in this report rests on counts the sites chose to release under their own disclosure "
        "policies; the report cannot see, and does not describe, records that were never read.</li>"
        "</ul></div></section>"
    )
