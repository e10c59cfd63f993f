"""Figures for planning, threshold choice and net benefit, in the report's style (:mod:`.plots`).

Each function takes plain numbers and returns a matplotlib :class:`~matplotlib.figure.Figure`; :func:`svg`
turns one into inline SVG text for the report (byte-for-byte reproducible) and :func:`save` writes SVG or
PNG for ``federation plan --plot``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from matplotlib import rc_context
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from federation.protocol.cli_support import write_atomic

from .plots import _RC, GREY, OKABE_ITO, _figure, _svg

__all__ = [
    "CurvePoint",
    "WidthPoint",
    "decision_curve_figure",
    "plan_figure",
    "save",
    "svg",
    "threshold_figure",
]


@dataclass(frozen=True)
class WidthPoint:
    """A simulated interval width at one number of sites: median and 10th-90th percentiles."""

    sites: int
    median: float | None
    p10: float | None
    p90: float | None


@dataclass(frozen=True)
class CurvePoint:
    """One point of a curve with an optional interval (None where not estimable)."""

    x: float
    y: float | None
    low: float | None = None
    high: float | None = None


def svg(figure: Figure, salt: str) -> str:
    """Inline SVG text of ``figure`` (reproducible: fixed hash salt, no date)."""
    with rc_context(_RC):
        return _svg(figure, salt)


def save(figure: Figure, path: Path) -> None:
    """Write ``figure`` to ``path`` as SVG or PNG (by the file's suffix), atomically."""
    suffix = Path(path).suffix.lower()
    if suffix == ".svg":
        write_atomic(path, svg(figure, Path(path).name).encode("utf-8"))
        return
    import io

    buffer = io.BytesIO()
    with rc_context(_RC):
        figure.savefig(buffer, format="png", dpi=150, metadata={"Software": None})
    write_atomic(path, buffer.getvalue())


def _series(axes, points: Sequence[WidthPoint], label: str, colour: str, marker: str, offset: float) -> None:
    shown = [p for p in points if p.median is not None]
    if not shown:
        return
    x = [p.sites + offset for p in shown]
    y = [p.median for p in shown]
    low = [p.median - (p.p10 if p.p10 is not None else p.median) for p in shown]  # type: ignore[operator]
    high = [(p.p90 if p.p90 is not None else p.median) - p.median for p in shown]  # type: ignore[operator]
    axes.errorbar(x, y, yerr=[low, high], fmt=marker, color=colour, capsize=2, lw=1, label=label, ms=5)


def plan_figure(
    sensitivity: Sequence[WidthPoint],
    specificity: Sequence[WidthPoint],
    target: float | None,
    title: str,
    level: float = 0.95,
) -> Figure:
    """Width of the pooled confidence intervals against the number of sites, with the target width."""
    with rc_context(_RC):
        figure = _figure(7.2, 3.6)
        axes = figure.add_axes((0.11, 0.22, 0.55, 0.66))
        axes.xaxis.set_major_locator(MaxNLocator(integer=True))
        pct = f"{100 * level:g}%"
        _series(axes, sensitivity, f"sensitivity, {pct} CI", OKABE_ITO["blue"], "o", -0.08)
        _series(axes, specificity, f"specificity, {pct} CI", OKABE_ITO["orange"], "s", 0.08)
        if target is not None:
            axes.axhline(target, color=GREY, ls="--", lw=1, label=f"target width {target:g}")
        axes.set_xlabel("sites")
        axes.set_ylabel("width of the pooled interval")
        axes.set_ylim(bottom=0)
        axes.set_title(title)
        axes.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0))
        figure.text(
            0.11, 0.015, "markers: median of the simulated consortia; bars: 10th to 90th percentile", fontsize=7.5
        )
    return figure


def threshold_figure(
    sensitivity: Sequence[CurvePoint],
    specificity: Sequence[CurvePoint],
    chosen: float | None,
    chosen_low: float | None,
    chosen_high: float | None,
    title: str,
) -> Figure:
    """Pooled sensitivity and specificity against the threshold, with the chosen threshold and its interval."""
    with rc_context(_RC):
        figure = _figure(7.2, 3.6)
        axes = figure.add_axes((0.11, 0.2, 0.55, 0.68))
        for points, label, colour, marker, style in (
            (sensitivity, "pooled sensitivity", OKABE_ITO["blue"], "o", "-"),
            (specificity, "pooled specificity", OKABE_ITO["orange"], "s", "--"),
        ):
            shown = [p for p in points if p.y is not None]
            if not shown:
                continue
            axes.plot([p.x for p in shown], [p.y for p in shown], style, marker=marker, color=colour, label=label)
            with_ci = [p for p in shown if p.low is not None and p.high is not None]
            axes.fill_between(
                [p.x for p in with_ci], [p.low for p in with_ci], [p.high for p in with_ci], color=colour, alpha=0.15
            )
        if chosen_low is not None and chosen_high is not None:
            axes.axvspan(chosen_low, chosen_high, color=GREY, alpha=0.15, label="bootstrap interval")
        if chosen is not None:
            axes.axvline(chosen, color=OKABE_ITO["black"], lw=1, ls=":", label=f"chosen: {chosen:g}")
        axes.set_xlabel("threshold (screen-positive when score ≥ threshold)")
        axes.set_ylim(0, 1)
        axes.set_title(title)
        axes.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0))
    return figure


def decision_curve_figure(
    model: Sequence[CurvePoint], screen_all: Sequence[CurvePoint], title: str, prediction: bool = False
) -> Figure:
    """Pooled net benefit of screening by the model, of assessing everyone, and of no one (0)."""
    with rc_context(_RC):
        figure = _figure(7.2, 3.6)
        axes = figure.add_axes((0.11, 0.2, 0.55, 0.68))
        for points, label, colour, marker, style in (
            (model, "screen by the model", OKABE_ITO["blue"], "o", "-"),
            (screen_all, "assess everyone", OKABE_ITO["vermillion"], "^", "--"),
        ):
            shown = [p for p in points if p.y is not None]
            if not shown:
                continue
            axes.plot([p.x for p in shown], [p.y for p in shown], style, marker=marker, color=colour, label=label)
            with_ci = [p for p in shown if p.low is not None and p.high is not None]
            if with_ci:
                axes.fill_between(
                    [p.x for p in with_ci],
                    [p.low for p in with_ci],
                    [p.high for p in with_ci],
                    color=colour,
                    alpha=0.15,
                )
        xs = [p.x for p in model] or [0.0, 1.0]
        axes.plot([min(xs), max(xs)], [0, 0], color=OKABE_ITO["black"], lw=1, label="assess no one")
        finite = [v for p in (*model, *screen_all) for v in (p.y, p.low, p.high) if v is not None]
        if finite:
            top = max(finite)
            axes.set_ylim(min(-0.05, -0.25 * max(top, 0.01)), top + 0.05 * max(top, 0.01) + 0.01)
        axes.set_xlabel("threshold probability")
        axes.set_ylabel("net benefit")
        axes.set_title(title)
        axes.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0))
        band = "prediction interval" if prediction else "confidence interval"
        figure.text(0.11, 0.015, f"shaded: {band} of the pooled net benefit", fontsize=7.5)
    return figure
