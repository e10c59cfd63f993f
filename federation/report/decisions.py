"""The report's section on choosing a threshold and on net benefit (:mod:`federation.decisions`).

Shown when the sites released the 2×2 at two or more thresholds (the request's ``--thresholds``, or ROC band
edges): pooled sensitivity and specificity at each threshold with the between-site spread, the threshold a
stated criterion picks with a bootstrap interval, and for a predicted-risk model the decision curve. The
section opens with its cautions: a threshold chosen on these sites is optimistic for them, and setting it
is a policy decision made with clinicians, not by this tool.
"""

from __future__ import annotations

from typing import Any

from federation.decisions import DecisionSettings, decision_analysis, decision_rows

from .decision_plots import CurvePoint, decision_curve_figure, svg, threshold_figure
from .html import csv_link, esc, figure, fmt_percent, table
from .inputs import ReportInputs

__all__ = ["decision_section"]
POLICY = (
    "Setting the screening threshold is a policy decision for the programme, made with clinicians and weighing "
    "missed cases against unnecessary assessments. This section informs that decision; the tool does not make it."
)


def _interval(value: Any, percent: bool = True) -> str:
    if not isinstance(value, dict) or value.get("estimate") is None:
        return "—"
    fmt = fmt_percent if percent else (lambda v: f"{v:.3f}")
    low, high = value.get("ci_low"), value.get("ci_high")
    if low is None or high is None:
        return esc(fmt(value["estimate"]))
    return esc(f"{fmt(value['estimate'])} ({fmt(low)}–{fmt(high)})")


def _range(value: Any) -> str:
    if not isinstance(value, dict) or value.get("ci_low") is None:
        return "—"
    return esc(f"{fmt_percent(value['ci_low'])}–{fmt_percent(value['ci_high'])}")


def _number(value: Any, digits: int = 2) -> str:
    return "—" if value is None else esc(f"{value:.{digits}f}")


def _csv(name: str, rows: list[dict[str, Any]], label: str) -> str:
    if not rows:
        return ""
    header = list(rows[0])
    return csv_link(name, header, ([row.get(h) for h in header] for row in rows), label)


def _accuracy_part(result: dict[str, Any], rows: dict[str, list[dict[str, Any]]], study: str) -> str:
    entries = result["thresholds"]
    body = [
        [
            esc(f"{e['threshold']:g}"),
            _interval(e.get("sensitivity")),
            _interval(e.get("specificity")),
            _range(e.get("sensitivity_prediction")),
            _range(e.get("specificity_prediction")),
            _number(e.get("tau_logit_sensitivity")),
            _number(e.get("tau_logit_specificity")),
            esc(len(e.get("sites_pooled", [])) if e.get("status") == "estimated" else e.get("status", "")),
        ]
        for e in entries
    ]
    source = (
        "the 2×2 tables at the request's thresholds"
        if result["source"] == "confusion"
        else "the 2×2 at each edge of the sites' released ROC bands"
    )
    html = (
        f"<h3>Pooled accuracy at each threshold</h3><p>From {source}: each threshold is pooled with the exact "
        "binomial bivariate model, withheld cells censored and bounded by the same site's other thresholds "
        "(screen-positives can only fall as the threshold rises). τ is the between-site SD on the logit scale; "
        "the prediction interval is where a new site's value is expected to fall.</p>"
    )
    html += table(
        [
            "threshold",
            "sensitivity (95% CI)",
            "specificity (95% CI)",
            "sensitivity, new site (95% PI)",
            "specificity, new site (95% PI)",
            "τ sensitivity",
            "τ specificity",
            "sites pooled",
        ],
        body,
        "Pooled sensitivity and specificity by threshold (screen-positive when score ≥ threshold)",
    )
    choice = result.get("choice", {})
    points = {
        measure: [
            CurvePoint(
                e["threshold"],
                (e.get(measure) or {}).get("estimate"),
                (e.get(measure) or {}).get("ci_low"),
                (e.get(measure) or {}).get("ci_high"),
            )
            for e in entries
        ]
        for measure in ("sensitivity", "specificity")
    }
    chart = threshold_figure(
        points["sensitivity"],
        points["specificity"],
        choice.get("threshold"),
        choice.get("ci_low"),
        choice.get("ci_high"),
        "Pooled accuracy by threshold",
    )
    html += figure(
        svg(chart, f"{study}-thresholds"),
        "Pooled sensitivity and specificity (lines, shaded 95% confidence intervals) at each released threshold; "
        "the dotted line is the threshold the criterion picks and the grey band its bootstrap interval.",
        "threshold-accuracy",
        [_csv(f"{study}-threshold-accuracy.csv", rows["threshold_accuracy"], "Data (CSV): accuracy by threshold")],
    )
    if choice.get("status") == "estimated":
        criterion = (
            f"the highest threshold whose pooled sensitivity reaches {choice['target']:g}"
            if choice["criterion"] == "target_sensitivity"
            else "the threshold with the highest pooled Youden's index (sensitivity + specificity − 1)"
        )
        interval = (
            f"; in {choice['replicates']} bootstrap resamples of the sites the criterion picked a threshold between "
            f"{choice['ci_low']:g} and {choice['ci_high']:g} (95% percentile interval)"
            if choice.get("ci_low") is not None
            else ""
        )
        picked = f"{choice['threshold']:g}"
        html += (
            f"<p>The criterion ({esc(criterion)}) picks <strong>{esc(picked)}</strong>"
            f"{esc(interval)}. There, pooled sensitivity is {_interval(choice.get('sensitivity'))} and specificity "
            f"{_interval(choice.get('specificity'))}; these are optimistic for these sites, which chose it.</p>"
        )
    else:
        html += f"<p>Threshold choice: {esc(choice.get('status', 'not estimable'))}.</p>"
    html += _csv(f"{study}-threshold-choice.csv", rows["threshold_choice"], "Data (CSV): threshold choice")
    return html


def _point(value: dict[str, Any] | None) -> tuple[float | None, float | None, float | None]:
    """A pooled value's estimate and interval, or three Nones when it was not estimated."""
    if not value:
        return None, None, None
    return value.get("estimate"), value.get("ci_low"), value.get("ci_high")


def _net_benefit_part(result: dict[str, Any], rows: dict[str, list[dict[str, Any]]], study: str) -> str:
    curve = result.get("net_benefit", {})
    html = (
        "<h3>Net benefit (decision curve)</h3><p>At a threshold probability p<sub>t</sub> — the risk at which "
        "further assessment is just worth it — net benefit = TP/n − FP/n × p<sub>t</sub>/(1 − p<sub>t</sub>): "
        "found cases per participant, less unnecessary assessments weighted by how many of them one found case "
        "is worth (Vickers &amp; Elkin 2006). It is computed only at the released thresholds, from the same 2×2 "
        "tables; sites' values are pooled by random effects (REML, Hartung–Knapp interval). Net benefit depends "
        "on prevalence, so sites differ by design.</p>"
    )
    if not curve.get("points"):
        reason = curve.get("status") or "; ".join(curve.get("notes", [])) or "not estimable"
        return html + f"<p>{esc(reason)}.</p>"
    body = []
    model_points, all_points = [], []
    for point in curve["points"]:
        pt = point["threshold_probability"]
        model, everyone, advantage = point.get("model"), point.get("screen_all"), point.get("advantage_over_all")
        model_points.append(CurvePoint(pt, *_point(model)))
        all_points.append(CurvePoint(pt, *_point(everyone)))
        body.append(
            [
                esc(f"{pt:g}"),
                _interval(model, percent=False),
                _pi(model),
                _interval(everyone, percent=False),
                "0",
                _interval(advantage, percent=False),
                esc(len(point["sites"]) - len(point.get("sites_not_pooled", []))),
            ]
        )
    html += table(
        [
            "threshold probability",
            "model (95% CI)",
            "model, new site (95% PI)",
            "assess everyone (95% CI)",
            "assess no one",
            "model minus assess everyone (95% CI)",
            "sites pooled",
        ],
        body,
        "Pooled net benefit by threshold probability",
    )
    chart = decision_curve_figure(model_points, all_points, "Decision curve (pooled across sites)")
    html += figure(
        svg(chart, f"{study}-decision-curve"),
        "Pooled net benefit of screening by the model, of assessing everyone and of assessing no one (0), at the "
        "released thresholds.",
        "decision-curve",
        [
            _csv(f"{study}-net-benefit-pooled.csv", rows["net_benefit_pooled"], "Data (CSV): pooled net benefit"),
            _csv(f"{study}-net-benefit-sites.csv", rows["net_benefit_sites"], "Data (CSV): net benefit per site"),
        ],
    )
    return html


def _pi(value: Any) -> str:
    if not isinstance(value, dict) or value.get("pi_low") is None:
        return "—"
    return esc(f"{value['pi_low']:.3f}–{value['pi_high']:.3f}")


def decision_section(inputs: ReportInputs, settings: DecisionSettings | None = None) -> str | None:
    """The section's HTML (with the coordinator's ``settings``), or None when the sites released no 2×2 at all."""
    settings = settings or DecisionSettings()
    result = decision_analysis(
        list(inputs.releases),
        inputs.score_kind,
        target_sensitivity=settings.target_sensitivity,
        bootstrap=settings.bootstrap,
        range_low=settings.range_low,
        range_high=settings.range_high,
    )
    rows = decision_rows(result)
    study = inputs.study_id
    head = (
        '<section id="threshold-choice"><h2>Choosing a threshold, and net benefit</h2><div class="caution"><ul>'
        f"<li><strong>{esc(POLICY)}</strong></li><li>{esc(result['caution'])}</li></ul></div>"
    )
    if not result["thresholds"]:
        # what was released, and the reason as the analysis gives it (found by following the coordinator's guide:
        # ROC bands were released at every site and the page still said "at one threshold only")
        released = int(result.get("thresholds_released") or 0)
        what = (
            f"The sites released {released} threshold(s) between them "
            f"({'the edges of their ROC bands' if result.get('source') == 'roc_bands' else 'their 2×2 tables'}), "
            if released
            else "The sites released no threshold beyond the primary table's, "
        )
        return (
            head + f"<p>{what}and no comparison of thresholds could be pooled: "
            f"{esc(str(result['choice'].get('status')))}. Sites merge score bands that hold too few participants, "
            "so their band edges rarely coincide; to compare thresholds, ask every site for the same ones "
            "(<code>federation request new --thresholds 0.2,0.3,0.5</code>).</p></section>"
        )
    return head + _accuracy_part(result, rows, study) + _net_benefit_part(result, rows, study) + "</section>"
