"""The summary a clinician reads first: pooled accuracy, how much sites differ, who was pooled and why.

Every number here is taken from the analysis JSON and written with :func:`~federation.report.html.traced`;
nothing is recomputed. Heterogeneity is put in words from I² and, when the analysis gives one, the 95%
prediction interval (what to expect at a new site), which says more to a reader than tau².
"""

from __future__ import annotations

from typing import Any

from .figures import humanise
from .html import esc, fmt_percent, table, traced
from .inputs import ReportInputs
from .readers import number
from .sroc import bivariate_results

__all__ = ["heterogeneity_words", "summary_section"]

MEASURES = (("sensitivity", "Sensitivity", "with the condition"), ("specificity", "Specificity", "without it"))


def quote(value: str, key: str, css: str = "quote") -> str:
    """A piece of text copied verbatim from the analysis JSON, tagged with its path."""
    return f'<span class="{css}" data-key="{esc(key)}">{esc(value)}</span>'


def ident(value: str) -> str:
    """An identifier from the store (site, study, hash): not a number, shown in monospace."""
    return f'<span class="ident hash">{esc(value)}</span>'


def _pct(value: float, key: str) -> str:
    return traced(value, key, fmt_percent(value))


def _interval(pooled: dict[str, Any], name: str) -> str:
    entry = pooled[name]
    text = (
        f"95% CI {_pct(entry['ci_low'], f'pooled.{name}.ci_low')} to {_pct(entry['ci_high'], f'pooled.{name}.ci_high')}"
    )
    if number(entry.get("pi_low")) is not None and number(entry.get("pi_high")) is not None:
        text += (
            f"<br>95% prediction interval {_pct(entry['pi_low'], f'pooled.{name}.pi_low')} to "
            f"{_pct(entry['pi_high'], f'pooled.{name}.pi_high')}"
        )
    return text


def _traced_interval(pooled: dict[str, Any], name: str) -> tuple[str, str, str] | None:
    """A pooled quantity's estimate and 95% interval (a between-site SD, a correlation) to three decimals, each
    traced to its place in the analysis JSON; None when any of the three is missing."""
    entry = pooled.get(name) if isinstance(pooled.get(name), dict) else {}
    keys = ("estimate", "ci_low", "ci_high")
    if any(number(entry.get(k)) is None for k in keys):
        return None
    estimate, ci_low, ci_high = (
        traced(entry[k], f"pooled.{name}.{k}", f"{entry[k]:.3f}".replace("-", "−")) for k in keys
    )
    return estimate, ci_low, ci_high


def heterogeneity_words(analysis: dict[str, Any], name: str, label: str) -> str:
    """One or two plain sentences on how much ``name`` differs between sites.

    The bands for I² (below 25%, 25–50%, 50–75%, 75% and above) follow Higgins JPT, Thompson SG, Deeks JJ,
    Altman DG (2003), Measuring inconsistency in meta-analyses, BMJ 327:557–560 (low, moderate, high);
    they are a rough guide, common practice, not a test.
    """
    pooled = analysis["pooled"]
    i2 = number(pooled.get(f"i2_logit_{name}"))
    tau2 = number(pooled.get(f"tau2_logit_{name}"))
    sentences = []
    if i2 is not None:
        i2_text = traced(pooled[f"i2_logit_{name}"], f"pooled.i2_logit_{name}", f"{100 * i2:.0f}%")
        if i2 < 0.25:
            words = "agreed closely between sites: the differences are about what chance alone would produce"
        elif i2 < 0.5:
            words = "differed somewhat between sites, a little more than chance alone would produce"
        elif i2 < 0.75:
            words = "differed substantially between sites, more than chance alone would produce"
        else:
            words = "differed considerably between sites, far more than chance alone would produce"
        tau_text = ""
        if tau2 is not None:
            tau = traced(pooled[f"tau2_logit_{name}"], f"pooled.tau2_logit_{name}", f"{tau2:.3f}")
            tau_text = f"; τ² {tau} on the log-odds scale"
        sentences.append(f"{label} {words} (I² {i2_text}{tau_text}).")
    elif tau2 is not None:  # the binomial headline model has a between-site variance but no I²
        tau = traced(pooled[f"tau2_logit_{name}"], f"pooled.tau2_logit_{name}", f"{tau2:.3f}")
        sentences.append(f"Between sites, {label.lower()} varied with τ² {tau} on the log-odds scale.")
    spread = _traced_interval(pooled, f"tau_logit_{name}")
    if spread is not None:
        sentences.append(
            f"Its between-site standard deviation τ is {spread[0]} on the log-odds scale (95% CI {spread[1]} to "
            f"{spread[2]})."
        )
    entry = pooled.get(name) if isinstance(pooled.get(name), dict) else {}
    if number(entry.get("pi_low")) is not None and number(entry.get("pi_high")) is not None:
        sentences.append(
            f"At a new site like these, expect a {label.lower()} between "
            f"{_pct(entry['pi_low'], f'pooled.{name}.pi_low')} and {_pct(entry['pi_high'], f'pooled.{name}.pi_high')} "
            "(95% prediction interval): that range, not the confidence interval, is what a new site should plan for."
        )
    else:
        observed = [
            (index, site)
            for index, site in enumerate(analysis["sites"])
            if isinstance(site.get(name), dict) and number(site[name].get("estimate")) is not None
        ]
        if len(observed) >= 2:
            low = min(observed, key=lambda pair: pair[1][name]["estimate"])
            high = max(observed, key=lambda pair: pair[1][name]["estimate"])
            low_text = _pct(low[1][name]["estimate"], f"sites.{low[0]}.{name}.estimate")
            high_text = _pct(high[1][name]["estimate"], f"sites.{high[0]}.{name}.estimate")
            sentences.append(
                f"The sites' own estimates ranged from {low_text} ({ident(low[1]['site_id'])}) to {high_text}"
                f" ({ident(high[1]['site_id'])}); a new site may differ from the pooled value by as much."
            )
    return " ".join(sentences)


def _headline(analysis: dict[str, Any]) -> str:
    pooled = analysis["pooled"]
    cards = []
    for name, label, who in MEASURES:
        entry = pooled.get(name)
        if not isinstance(entry, dict) or number(entry.get("estimate")) is None:
            continue
        css = "card spec" if name == "specificity" else "card"
        cards.append(
            f'<div class="{css}" id="pooled-{name}"><span class="small">Pooled {label.lower()} '
            f"(share of participants {who} whom the screen calls {'positive' if name == 'sensitivity' else 'negative'})"
            f'</span><span class="big">{_pct(entry["estimate"], f"pooled.{name}.estimate")}</span>'
            f'<span class="small">{_interval(pooled, name)}</span></div>'
        )
    return f'<div class="headline">{"".join(cards)}</div>' if cards else ""


def _estimate_cell(entry: Any, key: str, prediction: dict[str, Any] | None) -> str:
    """``71.2% (64.6% to 77.0%)`` and, below it, the prediction interval, every number traced."""
    if not isinstance(entry, dict) or number(entry.get("estimate")) is None:
        return "—"
    text = (
        f"{_pct(entry['estimate'], f'{key}.estimate')} ({_pct(entry['ci_low'], f'{key}.ci_low')} to "
        f"{_pct(entry['ci_high'], f'{key}.ci_high')})"
    )
    if prediction is not None:
        low, high = prediction["low"], prediction["high"]
        text += f"<br><small>PI {_pct(low[0], low[1])} to {_pct(high[0], high[1])}</small>"
    return text


def _prediction(entry: Any, key: str, separate: Any, separate_key: str) -> dict[str, Any] | None:
    """Where a model keeps its prediction interval: ``pi_low``/``pi_high`` beside the estimate, or a separate
    interval object (``sensitivity_prediction``)."""
    if isinstance(entry, dict) and number(entry.get("pi_low")) is not None:
        return {"low": (entry["pi_low"], f"{key}.pi_low"), "high": (entry["pi_high"], f"{key}.pi_high")}
    if isinstance(separate, dict) and number(separate.get("ci_low")) is not None:
        return {
            "low": (separate["ci_low"], f"{separate_key}.ci_low"),
            "high": (separate["ci_high"], f"{separate_key}.ci_high"),
        }
    return None


def models_table(analysis: dict[str, Any]) -> str:
    """One row per pooling model the analysis ran: sites in it, sensitivity and specificity with CI and PI."""
    pooled = analysis["pooled"]
    models: list[tuple[str, str, dict[str, Any]]] = [
        ("pooled", "bivariate binomial GLMM, every site (headline)", pooled)
    ]
    for path, value in bivariate_results(analysis):
        if path[-1] == "bivariate_glmm_suppression_aware":
            continue  # the headline itself, in full
        models.append((".".join(map(str, path)), humanise(path[-1:]), value))
    univariate = (pooled.get("sensitivity_analyses") or {}).get("univariate")
    if isinstance(univariate, dict):
        models.append(
            ("pooled.sensitivity_analyses.univariate", "univariate random effects (sensitivity analysis)", univariate)
        )
    if len(models) < 2:
        return ""
    rows = []
    for key, label, model in models:
        if model.get("sensitivity") is None:
            continue
        if isinstance(model.get("n_sites"), int):
            sites = traced(model["n_sites"], f"{key}.n_sites", str(model["n_sites"]))
        else:
            sites = traced(
                len(model.get("sites_pooled", [])), f"{key}.sites_pooled#len", str(len(model.get("sites_pooled", [])))
            )
        cells = [esc(label), sites]
        for name in ("sensitivity", "specificity"):
            prediction = _prediction(
                model.get(name), f"{key}.{name}", model.get(f"{name}_prediction"), f"{key}.{name}_prediction"
            )
            cells.append(_estimate_cell(model.get(name), f"{key}.{name}", prediction))
        rows.append(cells)
    if len(rows) < 2:
        return ""
    header = ["model", "sites", "sensitivity (95% CI; PI)", "specificity (95% CI; PI)"]
    return (
        "<p>The same releases pooled by each model the analysis ran (PI: 95% prediction interval for a new site). "
        "The bivariate models respect the correlation between sensitivity and specificity; the binomial model "
        "needs no continuity correction, and its form with withheld cells kept in keeps sites whose small cells were "
        "withheld, which stops the pool leaning toward large sites.</p>"
        + table(header, rows, "Pooled estimates by model")
    )


def _not_pooled(inputs: ReportInputs) -> str:
    pooled = inputs.analysis["pooled"]
    items = [
        f"<li>{ident(entry['site_id'])}: {quote(entry['reason'], f'pooled.sites_not_pooled.{i}.reason')}</li>"
        for i, entry in enumerate(pooled.get("sites_not_pooled", []))
    ]
    items += [
        f"<li>{ident(site)}: enrolled in this store but sent no release for this study</li>"
        for site in inputs.enrolled_without_release
    ]
    return f"<ul>{''.join(items)}</ul>" if items else ""


def summary_section(inputs: ReportInputs) -> str:
    """The Summary section (HTML)."""
    analysis = inputs.analysis
    pooled = analysis["pooled"]
    sites = analysis["sites"]
    n_pooled = len(pooled.get("sites_pooled", []))
    parts = ['<section id="summary"><h2>Summary</h2>']
    parts.append(
        f"<p>Study {quote(analysis['study_id'], 'study_id', 'quote ident hash')}. Model bundle "
        + ", ".join(ident(h) for h in inputs.bundle_sha256)
        + f". Evidence: the stored site releases, digest {ident(inputs.releases_digest)}.</p>"
    )
    parts.append(_headline(analysis))
    unsupported = pooled.get("not_estimable") if isinstance(pooled.get("not_estimable"), dict) else {}
    if unsupported and (pooled.get("sensitivity") is not None or pooled.get("specificity") is not None):
        # Some figures stand and some cannot be estimated: say which, in the analysis's own words.
        items = "".join(
            f"<li>{esc(name.replace('_', ' '))}: {quote(str(reason), f'pooled.not_estimable.{name}')}</li>"
            for name, reason in unsupported.items()
        )
        parts.append(f'<div class="note" id="not-estimable"><ul>{items}</ul></div>')
    if pooled.get("sensitivity") is None or pooled.get("specificity") is None:
        note = pooled.get("note")
        reason = quote(note, "pooled.note") if isinstance(note, str) else "too few sites could be pooled"
        parts.append(
            f'<div class="note" id="no-pooled-estimate"><strong>No pooled estimate.</strong> {reason}. '
            "A pooled estimate (and its diamond in the forest plots) needs as many sites with a usable table as the "
            "reason above says; each site's own estimate below stands on its own and should not be read as the "
            "accuracy to expect elsewhere.</div>"
        )
    else:
        for name, label, _ in MEASURES:
            words = heterogeneity_words(analysis, name, label)
            if words:
                parts.append(f"<p>{words}</p>")
        correlation = _traced_interval(pooled, "correlation")
        if correlation is not None:
            parts.append(
                "<p>Across sites, the logits of sensitivity and specificity had a correlation of "
                f"{correlation[0]} (95% CI {correlation[1]} to {correlation[2]}); a negative value is what a "
                "threshold that differs between sites produces.</p>"
            )
    has_pool = pooled.get("sensitivity") is not None
    parts.append(
        f"<p>{traced(n_pooled, 'pooled.sites_pooled#len', str(n_pooled))} of "
        f"{traced(len(sites), 'sites#len', str(len(sites)))} sites with a release "
        + ("were pooled" if has_pool else "had a table fit for pooling, too few to pool")
        + (f" ({', '.join(ident(s) for s in pooled['sites_pooled'])})" if n_pooled else "")
        + ". Pooling method: "
        + quote(pooled.get("method", "not stated"), "pooled.method")
        + ".</p>"
    )
    parts.append(models_table(analysis))
    not_pooled = _not_pooled(inputs)
    if not_pooled:
        parts.append(f"<p>Not pooled, and why:</p>{not_pooled}")
    corrected = pooled.get("continuity_corrected_sites") or []
    if corrected:
        parts.append(
            "<p>A continuity correction was applied for pooling at "
            + ", ".join(ident(s) for s in corrected)
            + " because a cell was zero (see Methods).</p>"
        )
    parts.append(
        '<p class="caution"><strong>Screening is not diagnosis.</strong> A positive screen calls for a full '
        "assessment; a negative screen does not rule the condition out. These results do not replace clinical "
        "judgement, local regulation, or ethics approval.</p></section>"
    )
    return "".join(parts)
