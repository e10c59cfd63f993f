"""`federation plan`: before the first request, how wide the pooled intervals will be and how many sites it takes.

Builds the scenario from the command line, runs :func:`federation.stats.planning.plan_consortium` (and
:func:`~federation.stats.planning.sites_needed` when a target width is given), and shows the plan as a
table, a figure (SVG or PNG) and JSON. The numbers come from simulated consortia pooled with the headline
model; Buderer's (1996) single-site sample size is shown beside them for reference.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from federation.protocol import ValidationToolError

__all__ = ["PlanError", "format_plan", "run_plan"]


class PlanError(ValidationToolError):
    pass


def _prevalence(text: str) -> tuple[float, float]:
    parts = text.split(":")
    try:
        values = [float(p) for p in parts]
    except ValueError:
        raise PlanError(f"--prevalence: {text!r} is not a number or a range LOW:HIGH") from None
    if len(values) == 1:
        values = values * 2
    if len(values) != 2 or not all(0 < v < 1 for v in values) or values[0] > values[1]:
        raise PlanError("--prevalence: give a proportion or a range LOW:HIGH, each strictly between 0 and 1")
    return values[0], values[1]


def _sizes(args: argparse.Namespace) -> tuple[int, ...]:
    if args.site_sizes:
        try:
            sizes = tuple(int(v) for v in args.site_sizes.split(","))
        except ValueError:
            raise PlanError("--site-sizes: give whole numbers separated by commas, e.g. 150,300,800") from None
        if not sizes or any(n < 1 for n in sizes):
            raise PlanError("--site-sizes: every site needs at least 1 participant")
        return sizes
    if args.sites is None or args.participants is None:
        raise PlanError("give the sites' sizes: --site-sizes N,N,... or --sites K --participants N")
    if args.sites < 1 or args.participants < 1:
        raise PlanError("--sites and --participants must be at least 1")
    return (args.participants,) * args.sites


def run_plan(args: argparse.Namespace) -> dict[str, Any]:
    """The plan as JSON: ``plan``, ``sites_needed`` (when --target-width), ``buderer`` and ``inputs``."""
    from federation.stats import PoolingError
    from federation.stats.planning import PlanScenario, buderer_sample_size, plan_consortium, sites_needed

    low, high = _prevalence(args.prevalence)
    sizes = _sizes(args)
    measures = ("sensitivity", "specificity") if args.measure == "both" else (args.measure,)
    try:
        scenario = PlanScenario(
            sensitivity=args.sensitivity,
            specificity=args.specificity,
            prevalence_low=low,
            prevalence_high=high,
            tau_sensitivity=args.tau_sensitivity,
            tau_specificity=args.tau_specificity,
            site_sizes=sizes,
            min_cell_size=args.min_cell_size,
            correlation=args.correlation,
            allow_zero=not args.zeros_withheld,
            level=args.level,
        )
        plan = plan_consortium(scenario, args.simulations, args.seed)
        result: dict[str, Any] = {"plan": plan.to_dict()}
        if args.target_width is not None:
            participants = args.participants or round(sum(sizes) / len(sizes))
            needed = sites_needed(
                scenario,
                participants,
                args.target_width,
                measures,
                args.simulations,
                args.seed,
                args.max_sites,
                known=(plan,),
            )
            result["sites_needed"] = needed.to_dict()
            middle = (low + high) / 2
            result["buderer"] = {
                measure: {
                    "participants": buderer_sample_size(
                        getattr(args, measure), args.target_width / 2, middle, measure, args.level
                    ),
                    "half_width": args.target_width / 2,
                    "prevalence": middle,
                    "method": "one site, Wald interval (Buderer 1996)",
                }
                for measure in measures
            }
    except PoolingError as error:
        raise PlanError(f"plan: {error}") from None
    return result


def _width(summary: dict[str, Any]) -> str:
    if summary.get("median") is None:
        return f"{'—':>8}  {'':<13}"
    return f"{summary['median']:>8.3f}  {summary['p10']:.3f}–{summary['p90']:.3f}"


def format_plan(result: dict[str, Any]) -> str:
    """The plan as a terminal table."""
    plan = result["plan"]
    scenario = plan["scenario"]
    sizes = scenario["site_sizes"]
    pct = f"{100 * scenario['level']:g}%"
    same = len(set(sizes)) == 1
    sites = f"{len(sizes)} site(s) of {sizes[0]} participants" if same else f"{len(sizes)} sites of {sizes}"
    prevalence = (
        f"{scenario['prevalence_low']:.0%}"
        if scenario["prevalence_low"] == scenario["prevalence_high"]
        else f"{scenario['prevalence_low']:.0%} to {scenario['prevalence_high']:.0%}"
    )
    lines = [
        f"Plan: {sites}; expected sensitivity {scenario['sensitivity']:g}, specificity {scenario['specificity']:g}, "
        f"prevalence {prevalence}",
        f"between-site SD (logit): sensitivity {scenario['tau_sensitivity']:g}, specificity "
        f"{scenario['tau_specificity']:g}, correlation {scenario['correlation']:g}; minimum cell size "
        f"{scenario['min_cell_size']}",
        f"{plan['simulations']} simulated consortia (seed {plan['seed']}); {plan['method']}",
        "",
        f"{'interval':<48}{'median':>8}  10th–90th percentile",
    ]
    for measure in ("sensitivity", "specificity"):
        lines.append(f"{f'pooled {measure}, {pct} confidence interval':<48}{_width(plan[f'{measure}_ci'])}")
    for measure in ("sensitivity", "specificity"):
        lines.append(f"{f'{measure} at a new site, prediction interval':<48}{_width(plan[f'{measure}_prediction'])}")
    lines += [
        "",
        f"sites whose table comes back partly withheld: {plan['share_sites_withheld']:.0%}",
        f"consortia the model could fit: {plan['fitted']} of {plan['simulations']}",
    ]
    lines += [f"note: {note}" for note in plan["notes"]]
    needed = result.get("sites_needed")
    if needed:
        lines += [
            "",
            f"Sites of {needed['participants']} participants for a {pct} interval of "
            f"{' and '.join(needed['measures'])} no wider than {needed['target_width']:g}:",
        ]
        answer = needed["sites"]
        lines.append(f"  {answer} sites" if answer is not None else f"  not within {needed['max_sites']} sites")
        lines.append(f"  {'sites':>6}{'sensitivity CI':>16}{'specificity CI':>16}{'withheld':>10}")
        for tried in needed["plans"]:
            k = len(tried["scenario"]["site_sizes"])
            se, sp = tried["sensitivity_ci"]["median"], tried["specificity_ci"]["median"]
            lines.append(
                f"  {k:>6}{'—' if se is None else f'{se:.3f}':>16}{'—' if sp is None else f'{sp:.3f}':>16}"
                f"{tried['share_sites_withheld']:>10.0%}"
            )
        lines += [f"  note: {note}" for note in needed["notes"]]
    for measure, value in result.get("buderer", {}).items():
        lines.append(
            f"one site instead (Buderer 1996): {value['participants']} participants for {measure} "
            f"± {value['half_width']:g} at prevalence {value['prevalence']:.0%}"
        )
    lines += [
        "",
        "Widths are medians over simulated consortia, not guarantees; a site's disclosure audit may withhold more.",
    ]
    return "\n".join(lines)


def plot_plan(result: dict[str, Any], path: Path) -> None:
    """Write the plan's figure (SVG or PNG by suffix): widths against the number of sites."""
    from federation.report.decision_plots import WidthPoint, plan_figure, save

    needed = result.get("sites_needed")
    plans = needed["plans"] if needed else [result["plan"]]
    series = {}
    for measure in ("sensitivity", "specificity"):
        series[measure] = [
            WidthPoint(
                len(p["scenario"]["site_sizes"]),
                p[f"{measure}_ci"]["median"],
                p[f"{measure}_ci"]["p10"],
                p[f"{measure}_ci"]["p90"],
            )
            for p in plans
        ]
    level = result["plan"]["scenario"]["level"]
    title = "Pooled interval width by number of sites" if needed else "Pooled interval width"
    figure = plan_figure(
        series["sensitivity"], series["specificity"], needed["target_width"] if needed else None, title, level
    )
    save(figure, path)
