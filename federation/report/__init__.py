"""The validation report: one self-contained HTML file built from the study store alone.

``build_report(store, study_id)`` gathers the analysis (the same call as ``federation analyze --json``) and
the stored releases, and returns the page with its sections: summary, participant flow, forest plots, SROC
(when a bivariate result exists), further analyses (when asked for or present), methods, cautions and
provenance with every figure's data and the full analysis as downloads. Same store in, same bytes out.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from federation.decisions import DecisionSettings
from federation.protocol import ValidationToolError
from federation.protocol.cli_support import write_atomic
from federation.store import Store

from .analyses import analysis_sections, render_json
from .decisions import decision_section
from .figures import accuracy_forests, humanise
from .flow import flow_section
from .html import esc, json_link, page, table
from .inputs import ReportInputs, gather
from .methods import cautions_section, methods_section
from .sroc import sroc_figures
from .summary import summary_section

__all__ = ["Report", "build_report", "write_report"]


@dataclass(frozen=True)
class Report:
    """A built report: the page, and what a command line needs to say about it."""

    html: str
    study_id: str
    sites: tuple[str, ...]
    sites_pooled: tuple[str, ...]
    enrolled_without_release: tuple[str, ...]
    sections: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "study_id": self.study_id,
            "sites": list(self.sites),
            "sites_pooled": list(self.sites_pooled),
            "enrolled_without_release": list(self.enrolled_without_release),
            "sections": list(self.sections),
        }


def _provenance(inputs: ReportInputs) -> str:
    rows = [
        [
            esc(r.site_id),
            f'<span class="hash">{esc(r.request_id)}</span>',
            esc(r.created_at),
            esc(r.min_cell_size if r.min_cell_size is not None else "—"),
            f'<span class="hash">{esc(r.release_sha256)}</span>',
        ]
        for r in sorted(inputs.releases, key=lambda r: (r.site_id, r.created_at))
    ]
    releases = [r.release.body() | {"signature": r.release.signature} for r in inputs.releases]
    return (
        '<section id="provenance"><h2>Provenance and downloads</h2>'
        "<p>Every number above comes from these signed site releases, each checked again against the key the site "
        "enrolled. The latest release of each site is analysed.</p>"
        + table(
            ["site", "request", "released at", "minimum cell size", "release SHA-256"],
            rows,
            "Stored releases",
            numeric_from=3,
        )
        + '<p class="downloads">'
        + json_link(
            f"{inputs.study_id}-analysis.json", inputs.analysis, "Full analysis (JSON, as federation analyze --json)"
        )
        + json_link(f"{inputs.study_id}-releases.json", releases, "All stored releases (JSON, signed)")
        + "</p></section>"
    )


def _unfitted_models(analysis: dict[str, Any]) -> str:
    """Notes for the pooling models the analysis tried but could not fit, with its reasons."""
    items = [
        f"<li>{esc(humanise((key,)))}: {esc(value['reason'])}</li>"
        for key, value in analysis["pooled"].items()
        if isinstance(value, dict) and isinstance(value.get("reason"), str) and value.get("sensitivity") is None
    ]
    return f'<div class="note"><p>Not fitted:</p><ul>{"".join(items)}</ul></div>' if items else ""


def _model_details(path: tuple, value: dict[str, Any]) -> str:
    label = humanise(path[-1:])
    slug = "-".join(str(p) for p in path).replace("_", "-")
    body = render_json(value, f"Model parameters: {label}", slug)
    return f"<details><summary>Model parameters and estimates: {esc(label)}</summary>{body}</details>"


def build_report(
    store: Store,
    study_id: str | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
    decisions: DecisionSettings | None = None,
) -> Report:
    """Build the report for one study of ``store`` (see the module docstring for its sections).

    ``covariates`` (per site id) are coordinator-supplied site covariates for the meta-regression;
    ``decisions`` the coordinator's target sensitivity and range of threshold probabilities.
    """
    inputs = gather(store, study_id, covariates)
    analysis = inputs.analysis
    sections: list[tuple[str, str, str]] = [
        ("summary", "Summary", summary_section(inputs)),
        ("flow", "Participant flow", flow_section(analysis)),
        ("forest", "Sensitivity and specificity by site", accuracy_forests(analysis)),
    ]
    sroc = sroc_figures(analysis, _model_details)
    unfitted = _unfitted_models(analysis)
    if sroc or unfitted:
        if not sroc:
            sroc = '<section id="sroc"><h2>Summary ROC (bivariate model)</h2></section>'
        sections.append(("sroc", "Summary ROC", sroc.replace("</section>", unfitted + "</section>")))
    sections += analysis_sections(inputs)
    choice = decision_section(inputs, decisions)
    if choice:
        sections.append(("threshold-choice", "Choosing a threshold, and net benefit", choice))
    sections += [
        ("methods", "Methods", methods_section(inputs)),
        ("cautions", "Cautions", cautions_section()),
        ("provenance", "Provenance and downloads", _provenance(inputs)),
    ]
    subtitle = (
        f"Study <code>{esc(inputs.study_id)}</code> · validation of a frozen screening model across "
        f"{len(analysis['sites'])} site(s) · built from <code>{esc(inputs.store_name)}</code>"
    )
    html = page(
        f"Validation report: {inputs.study_id}",
        subtitle,
        [(anchor, title) for anchor, title, _ in sections],
        "".join(body for _, _, body in sections),
    )
    return Report(
        html=html,
        study_id=inputs.study_id,
        sites=tuple(s["site_id"] for s in analysis["sites"]),
        # the sites behind a pooled estimate: none when the headline model could not be fitted (its sites_pooled
        # then lists the sites fit for pooling, which were too few)
        sites_pooled=tuple(analysis["pooled"].get("sites_pooled", []))
        if analysis["pooled"].get("sensitivity") is not None
        else (),
        enrolled_without_release=inputs.enrolled_without_release,
        sections=tuple(anchor for anchor, _, _ in sections),
    )


def write_report(
    store_path: Path,
    out: Path,
    study_id: str | None = None,
    covariates: dict[str, dict[str, float | str]] | None = None,
    decisions: DecisionSettings | None = None,
) -> Report:
    """Build the report from the store at ``store_path`` and write it atomically to ``out``."""
    if not Path(store_path).is_file():
        # Store() would create an empty database; a report of nothing helps no one.
        raise ValidationToolError(f"{store_path}: study store not found")
    store = Store(store_path)
    try:
        report = build_report(store, study_id, covariates, decisions)
    finally:
        store.close()
    write_atomic(out, report.html.encode("utf-8"))
    return report
