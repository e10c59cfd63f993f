"""The report's figures, drawn with matplotlib and returned as inline SVG text.

Each function takes plain numbers (no analysis JSON), so it can be checked on its own. Colours are the
Okabe–Ito palette, distinguishable with the common colour-vision deficiencies (Okabe M, Ito K (2008).
Color Universal Design: how to make figures and presentations that are friendly to colorblind people);
lines also differ in style, so the figures read in greyscale print. Text stays text in the SVG
(``svg.fonttype = "none"``), so it is searchable and small; output is byte-for-byte reproducible
(fixed hash salt, no date in the metadata).
"""

from __future__ import annotations

import functools
import io
import math
import textwrap
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import matplotlib

matplotlib.use("Agg")  # no display, no GUI toolkit: the report is built on servers

from matplotlib import rc_context  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Polygon  # noqa: E402
from matplotlib.ticker import LogLocator, NullLocator  # noqa: E402

__all__ = [
    "OKABE_ITO",
    "CalibrationSeries",
    "ForestRow",
    "ForestSummary",
    "RocSeries",
    "SrocInputs",
    "calibration_plot",
    "forest_plot",
    "roc_plot",
    "sroc_plot",
]

OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
# Cycle for per-site series; yellow is left out because it is too light on white paper.
SERIES = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#000000")
GREY = "#8c8c8c"

_RC = {
    "svg.fonttype": "none",
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans", "Arial"],
    "font.size": 9.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "legend.frameon": False,
    "legend.fontsize": 8.5,
}


def _styled(func: Callable[..., str]) -> Callable[..., str]:
    """Run a plotting function with the report's style (rcParams are read as artists are made)."""

    @functools.wraps(func)
    def wrapper(*args: object, **kwargs: object) -> str:
        with rc_context(_RC):
            return func(*args, **kwargs)

    return wrapper


def _svg(fig: Figure, salt: str) -> str:
    buffer = io.StringIO()
    with rc_context({"svg.hashsalt": salt}):
        # Axes are placed by hand, so no "tight" bounding box: it would draw every figure twice.
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]  # drop the XML prolog and DOCTYPE: the SVG sits inside HTML


def _figure(width: float, height: float) -> Figure:
    return Figure(figsize=(width, height), dpi=100)


@dataclass(frozen=True)
class ForestRow:
    """One site in a forest plot; ``estimate`` None when the site's value is suppressed or undefined."""

    label: str
    estimate: float | None
    low: float | None
    high: float | None
    size: float | None = None  # sample size behind the estimate: sets the marker area
    text: str = ""  # right-hand column, e.g. "158/199  79.4% (73.2–84.4%)"
    pooled: bool = True  # False draws the site in grey, outside the pool


@dataclass(frozen=True)
class ForestSummary:
    """The pooled estimate drawn as a diamond, with an optional prediction interval beneath it."""

    label: str
    estimate: float
    low: float
    high: float
    pi_low: float | None = None
    pi_high: float | None = None
    text: str = ""


@_styled
def forest_plot(
    title: str,
    xlabel: str,
    rows: Sequence[ForestRow],
    summary: ForestSummary | None,
    salt: str,
    no_summary_reason: str = "",
    xlim: tuple[float, float] | None = (0.0, 1.0),
    log_scale: bool = False,
    reference: float | None = None,
    percent: bool = True,
    summary_label: str = "Pooled",
) -> str:
    """Per-site estimates with 95% intervals, the pooled diamond and its prediction interval.

    Marker area is proportional to the sample size behind each estimate (square), as forest plots usually
    draw it; without a pooled estimate the last row says why instead of showing a diamond.

    References
    ----------
    Lewis S, Clarke M (2001). Forest plots: trying to see the wood and the trees. BMJ 322:1479–1480.
    """
    n_rows = len(rows) + 2
    fig = _figure(9.0, 1.0 + 0.3 * n_rows)
    ax = fig.add_axes((0.24, 0.12, 0.46, 0.78))
    sizes = [r.size for r in rows if r.size]
    biggest = max(sizes) if sizes else 1.0
    y_labels, y_ticks = [], []
    for index, row in enumerate(rows):
        y = n_rows - 1 - index
        y_ticks.append(y)
        y_labels.append(row.label)
        colour = OKABE_ITO["blue"] if row.pooled else GREY
        if row.estimate is not None:
            if row.low is not None and row.high is not None:
                ax.plot([row.low, row.high], [y, y], color=colour, linewidth=1.3, solid_capstyle="butt")
            area = 20 + 110 * math.sqrt((row.size or biggest) / biggest)
            # A site value without an interval is drawn hollow, so it does not look as certain as the others.
            hollow = row.low is None or row.high is None
            ax.scatter(
                [row.estimate],
                [y],
                s=area,
                marker="s",
                zorder=3,
                linewidths=1.2,
                facecolors="none" if hollow else colour,
                edgecolors=colour,
            )
        ax.text(
            1.03,
            y,
            row.text,
            transform=ax.get_yaxis_transform(),
            va="center",
            ha="left",
            fontsize=9,
            color=OKABE_ITO["black"] if row.pooled else "#555555",
        )
    y_pool = 0.35
    y_ticks.append(y_pool)
    if summary is not None:
        y_labels.append(summary.label)
        diamond = [
            (summary.low, y_pool),
            (summary.estimate, y_pool + 0.32),
            (summary.high, y_pool),
            (summary.estimate, y_pool - 0.32),
        ]
        ax.add_patch(Polygon(diamond, closed=True, color=OKABE_ITO["black"], zorder=3))
        ax.axvline(summary.estimate, color=OKABE_ITO["black"], linestyle=(0, (2, 2)), linewidth=0.8, zorder=1)
        if summary.pi_low is not None and summary.pi_high is not None:
            y_pi = y_pool - 0.62
            ax.plot([summary.pi_low, summary.pi_high], [y_pi, y_pi], color=OKABE_ITO["vermillion"], linewidth=2.2)
            for end in (summary.pi_low, summary.pi_high):
                ax.plot([end, end], [y_pi - 0.14, y_pi + 0.14], color=OKABE_ITO["vermillion"], linewidth=1.5)
            ax.text(
                1.03,
                y_pi,
                "95% prediction interval",
                transform=ax.get_yaxis_transform(),
                va="center",
                fontsize=8,
                color=OKABE_ITO["vermillion"],
            )
        ax.text(
            1.03, y_pool, summary.text, transform=ax.get_yaxis_transform(), va="center", fontsize=8.5, fontweight="bold"
        )
    else:
        y_labels.append(summary_label)
        ax.text(
            0.01,
            y_pool,
            no_summary_reason or "not pooled",
            transform=ax.get_yaxis_transform(),
            ha="left",
            va="center",
            fontsize=8.5,
            style="italic",
            color=OKABE_ITO["vermillion"],
        )
    if reference is not None:
        ax.axvline(reference, color=GREY, linewidth=0.8, zorder=0)
    ax.set_yticks(y_ticks, y_labels)
    ax.tick_params(axis="y", length=0)
    ax.spines["left"].set_visible(False)
    ax.set_ylim(-0.6, n_rows - 0.5)
    if log_scale:
        ax.set_xscale("log")
        # Plain numbers (0.2, 0.5, 1, 2, 5, 10) read better than powers of ten on a clinical forest plot.
        ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_minor_locator(NullLocator())
        ax.xaxis.set_major_formatter(lambda value, _pos: f"{value:g}")
    if xlim is not None:
        ax.set_xlim(*xlim)
    if percent:
        ax.xaxis.set_major_formatter(lambda value, _pos: f"{100 * value:.0f}%")
    ax.set_xlabel(xlabel)
    fig.text(0.01, 0.985, title, ha="left", va="top", fontsize=10.5, fontweight="bold")
    ax.grid(axis="x", color="#e0e0e0", linewidth=0.6)
    ax.set_axisbelow(True)
    return _svg(fig, salt)


@dataclass(frozen=True)
class SrocInputs:
    """Sites in ROC space, the bivariate summary point, its regions and the SROC curve.

    All coordinates are (false-positive rate, sensitivity) = (1 − specificity, sensitivity).
    """

    site_labels: Sequence[str]
    site_fpr: Sequence[float]
    site_sensitivity: Sequence[float]
    site_size: Sequence[float]
    summary: tuple[float, float] | None = None
    confidence_region: Sequence[tuple[float, float]] = ()
    prediction_region: Sequence[tuple[float, float]] = ()
    curve: Sequence[tuple[float, float]] = ()


@_styled
def sroc_plot(data: SrocInputs, title: str, salt: str) -> str:
    """Summary ROC plot (Rutter & Gatsonis 2001; Reitsma et al. 2005; Harbord et al. 2007).

    Site points are circles with area proportional to the site's sample size.
    """
    fig = _figure(5.6, 5.2)
    ax = fig.add_axes((0.13, 0.12, 0.82, 0.8))
    ax.plot([0, 1], [0, 1], color="#d0d0d0", linewidth=0.8, zorder=0)
    if data.curve:
        xs, ys = zip(*data.curve, strict=True)
        ax.plot(xs, ys, color=OKABE_ITO["black"], linewidth=1.6, label="SROC curve")
    if data.prediction_region:
        xs, ys = zip(*data.prediction_region, strict=True)
        ax.plot(
            xs,
            ys,
            color=OKABE_ITO["vermillion"],
            linestyle=(0, (1.5, 1.5)),
            linewidth=1.4,
            label="95% prediction region",
        )
    if data.confidence_region:
        xs, ys = zip(*data.confidence_region, strict=True)
        ax.plot(xs, ys, color=OKABE_ITO["blue"], linestyle=(0, (5, 2)), linewidth=1.4, label="95% confidence region")
    biggest = max(data.site_size) if data.site_size else 1.0
    areas = [25 + 350 * (n / biggest) for n in data.site_size]
    ax.scatter(
        data.site_fpr,
        data.site_sensitivity,
        s=areas,
        facecolors="none",
        edgecolors=OKABE_ITO["orange"],
        linewidths=1.4,
        label="site (area ∝ participants)",
        zorder=3,
    )
    if data.summary is not None:
        ax.scatter(
            [data.summary[0]],
            [data.summary[1]],
            s=70,
            marker="D",
            color=OKABE_ITO["black"],
            label="summary point",
            zorder=4,
        )
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_aspect("equal")
    ax.xaxis.set_major_formatter(lambda value, _pos: f"{100 * value:.0f}%")
    ax.yaxis.set_major_formatter(lambda value, _pos: f"{100 * value:.0f}%")
    ax.set_xlabel("False-positive rate (1 − specificity)")
    ax.set_ylabel("Sensitivity")
    ax.set_title("\n".join(textwrap.wrap(title, 48)), fontsize=10)
    ax.legend(loc="lower right")
    ax.grid(color="#eeeeee", linewidth=0.6)
    return _svg(fig, salt)


@dataclass(frozen=True)
class RocSeries:
    """One ROC curve: false-positive rates and sensitivities at successive thresholds."""

    label: str
    fpr: Sequence[float]
    tpr: Sequence[float]
    pooled: bool = False


@_styled
def roc_plot(series: Sequence[RocSeries], title: str, salt: str) -> str:
    """ROC curves: per site thin and coloured, pooled thick and black."""
    fig = _figure(5.6, 5.2)
    ax = fig.add_axes((0.13, 0.12, 0.82, 0.8))
    ax.plot([0, 1], [0, 1], color="#d0d0d0", linewidth=0.8, zorder=0, label="no discrimination")
    site_index = 0
    for item in series:
        if item.pooled:
            ax.plot(item.fpr, item.tpr, color=OKABE_ITO["black"], linewidth=2.4, label=item.label, zorder=4)
        else:
            colour = SERIES[site_index % len(SERIES)]
            ax.plot(item.fpr, item.tpr, color=colour, linewidth=1.0, marker="o", markersize=2.5, label=item.label)
            site_index += 1
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_aspect("equal")
    ax.set_xlabel("False-positive rate (1 − specificity)")
    ax.set_ylabel("Sensitivity")
    ax.set_title(title)
    ax.legend(loc="lower right", fontsize=7.5)
    ax.grid(color="#eeeeee", linewidth=0.6)
    return _svg(fig, salt)


@dataclass(frozen=True)
class CalibrationSeries:
    """Observed event rate against mean predicted risk, one point per risk bin."""

    label: str
    predicted: Sequence[float]
    observed: Sequence[float]
    size: Sequence[float]
    pooled: bool = False


@_styled
def calibration_plot(series: Sequence[CalibrationSeries], title: str, salt: str) -> str:
    """Calibration plot: observed against predicted risk by bin, per site and pooled (Van Calster et al. 2019)."""
    fig = _figure(5.6, 5.2)
    ax = fig.add_axes((0.13, 0.12, 0.82, 0.8))
    top = max([1e-3, *(v for s in series for v in (*s.predicted, *s.observed))])
    top = min(1.0, math.ceil(top * 10 + 0.5) / 10)
    ax.plot([0, top], [0, top], color=GREY, linewidth=0.9, linestyle=(0, (4, 2)), label="perfect calibration")
    site_index = 0
    for item in series:
        if item.pooled:
            ax.plot(
                item.predicted,
                item.observed,
                color=OKABE_ITO["black"],
                linewidth=2.2,
                marker="D",
                markersize=4,
                label=item.label,
                zorder=4,
            )
        else:
            colour = SERIES[site_index % len(SERIES)]
            ax.plot(
                item.predicted,
                item.observed,
                color=colour,
                linewidth=0.9,
                marker="o",
                markersize=3,
                label=item.label,
                alpha=0.9,
            )
            site_index += 1
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.set_aspect("equal")
    ax.xaxis.set_major_formatter(lambda value, _pos: f"{100 * value:.0f}%")
    ax.yaxis.set_major_formatter(lambda value, _pos: f"{100 * value:.0f}%")
    ax.set_xlabel("Predicted risk (mean in bin)")
    ax.set_ylabel("Observed proportion with the condition")
    ax.set_title(title)
    ax.legend(loc="upper left", fontsize=7.5)
    ax.grid(color="#eeeeee", linewidth=0.6)
    return _svg(fig, salt)
