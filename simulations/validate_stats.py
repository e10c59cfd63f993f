"""Simulation study: bias and coverage of every pooling method the tool reports, in several consortia.

Each synthetic consortium has sites whose true logit sensitivity and logit false-positive rate are drawn
from a bivariate normal distribution with known mean, so the true summary sensitivity and specificity
(``expit`` of the mean, the quantity every bivariate model estimates) are known. Each site's records
pass through the project's own disclosure rule (:func:`site_agent.disclosure.suppress`, with the flow and
2×2 relations a release carries: records read = analysed + excluded by reason; analysed = with + without
the condition; with = TP + FN; without = FP + TN), and the coordinator pools what was released.

Methods, one row per interval (the ``interval`` column names its reference distribution, so z and t are
never mixed in one column):

- ``headline``: the bivariate binomial GLMM over every site, withheld cells censored under the replayed
  rule, profile-likelihood interval referred to t on k − 2 df (:mod:`federation.stats.headline`);
- ``glmm_censored``: the same fit with Wald intervals (z, and t on k − 2 df);
- ``glmm_drop``: the binomial GLMM of the sites released in full, Wald t on k − 2 df;
- ``reitsma_drop``: bivariate normal REML of the sites released in full, Wald z;
- ``univariate_drop``: DerSimonian–Laird of each measure over the sites released in full (0.5 added to a
  table with a zero cell), Wald z;
- with ``--compare-reference``, also ``headline`` [profile, z]: the same profile likelihood with the plain
  chi-squared(1) cut-off, the alternative the headline's t(k − 2) reference was chosen over.

Reported per scenario, method and measure: bias of the pooled sensitivity and specificity (probability
scale) with its Monte Carlo standard error (MCSE), RMSE, coverage of the 95% interval with its MCSE
(goal 93–97%), mean interval width, how many sites each method pooled, and fits that failed or were
declared not estimable.

Run: ``make validate-stats`` (300 consortia per scenario), ``make validate-stats VALIDATE_QUICK=1`` (60
per scenario, about a CPU-minute) or
``python -m simulations.validate_stats --consortia 200``.
Everything is invented; nothing here describes a real consortium.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from collections.abc import Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy import optimize, special, stats
from threadpoolctl import threadpool_limits

from federation.stats import PoolingError, ReleasedTable, glmm_accuracy, random_effects, reitsma
from federation.stats.glmm import glmm_evidence, glmm_fit
from federation.stats.headline import headline_accuracy
from site_agent.counts import Relation
from site_agent.disclosure import is_unsafe, suppress

# (method, interval) rows of the table; the interval names its reference distribution.
ROWS = (
    ("headline", "profile, t(k-2)"),
    ("glmm_censored", "Wald, t(k-2)"),
    ("glmm_censored", "Wald, z"),
    ("glmm_drop", "Wald, t(k-2)"),
    ("reitsma_drop", "Wald, z"),
    ("univariate_drop", "Wald, z"),
)
# With --compare-reference: the headline's profile likelihood with the plain chi-squared(1) cut-off (the signed
# root against the normal quantile), the alternative its t(k-2) reference was chosen over.
COMPARISON = ("headline", "profile, z")
REASONS = ("duplicate_id", "missing_outcome", "missing_feature", "out_of_range", "unknown_category")
DEFAULT_OUT = Path(__file__).with_name("validate_stats_results.json")


@dataclass(frozen=True)
class Scenario:
    """The truth and the design of every synthetic consortium (all invented)."""

    name: str = "mixed"
    sensitivity: float = 0.85
    specificity: float = 0.80
    sd_logit_sensitivity: float = 0.5
    sd_logit_fpr: float = 0.5
    correlation: float = 0.3  # between logit sensitivity and logit FPR across sites
    sites: int = 15
    min_size: int = 30
    max_size: int = 1500
    min_prevalence: float = 0.10
    max_prevalence: float = 0.50
    exclusion_rates: tuple[float, ...] = (0.0, 0.005, 0.03, 0.005, 0.002)  # per reason, of records read
    min_cell_size: int = 10
    allow_zero: bool = True

    @property
    def mean(self) -> np.ndarray:
        return np.array(
            [math.log(self.sensitivity / (1 - self.sensitivity)), math.log((1 - self.specificity) / self.specificity)]
        )

    @property
    def covariance(self) -> np.ndarray:
        s1, s2, rho = self.sd_logit_sensitivity, self.sd_logit_fpr, self.correlation
        return np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])


# The release's names of the counts whose rule the pooling reads (federation.analysis._rules_named).
_POOLING_NAMES = {
    "confusion[0].tp": "tp",
    "confusion[0].fp": "fp",
    "confusion[0].fn": "fn",
    "confusion[0].tn": "tn",
    "flow.analysed_positive": "positives",
    "flow.analysed_negative": "negatives",
    "flow.analysed": "analysed",
}


def release_table(
    site_id: str,
    tp: int,
    fp: int,
    fn: int,
    tn: int,
    excluded: Sequence[int],
    k: int,
    allow_zero: bool,
    name_rules: bool = True,
) -> ReleasedTable:
    """Apply the site's disclosure rule to one site's flow and 2×2 and return what the coordinator sees.

    As a real release does, it names the rule that withheld each count (``suppressed_by``:
    ``minimum_cell_size`` for a count in the unsafe range, ``complementary`` for one hidden so that such a
    count cannot be recomputed); ``name_rules=False`` leaves the rules out (an older release).
    """
    analysed = tp + fp + fn + tn
    counts = {
        "flow.read": analysed + sum(excluded),
        "flow.analysed": analysed,
        "flow.analysed_positive": tp + fn,
        "flow.analysed_negative": fp + tn,
        "confusion[0].tp": tp,
        "confusion[0].fp": fp,
        "confusion[0].fn": fn,
        "confusion[0].tn": tn,
    }
    counts.update({f"flow.excluded.{r}": int(v) for r, v in zip(REASONS, excluded, strict=True)})
    relations = [
        Relation("flow.read", ("flow.analysed", *(f"flow.excluded.{r}" for r in REASONS))),
        Relation("flow.analysed", ("flow.analysed_positive", "flow.analysed_negative")),
        Relation("flow.analysed_positive", ("confusion[0].tp", "confusion[0].fn")),
        Relation("flow.analysed_negative", ("confusion[0].fp", "confusion[0].tn")),
    ]
    shown, hidden = suppress(counts, relations, k, allow_zero)
    rules = {
        _POOLING_NAMES[name]: "minimum_cell_size" if is_unsafe(counts[name], k, allow_zero) else "complementary"
        for name in hidden
        if name in _POOLING_NAMES and name_rules
    }
    return ReleasedTable(
        site_id,
        shown["confusion[0].tp"],
        shown["confusion[0].fp"],
        shown["confusion[0].fn"],
        shown["confusion[0].tn"],
        positives=shown["flow.analysed_positive"],
        negatives=shown["flow.analysed_negative"],
        analysed=shown["flow.analysed"],
        read=shown["flow.read"],
        excluded=tuple(shown[f"flow.excluded.{r}"] for r in REASONS),
        min_cell_size=k,
        allow_zero=allow_zero,
        excluded_names=REASONS,
        suppressed_by=rules,
        replayable=True,  # only the flow and the 2x2, one release, no audit: the coordinator replays the rule
    )


def consortium(scenario: Scenario, rng: np.random.Generator) -> list[ReleasedTable]:
    tables = []
    thetas = rng.multivariate_normal(scenario.mean, scenario.covariance, size=scenario.sites)
    for i in range(scenario.sites):
        size = int(round(math.exp(rng.uniform(math.log(scenario.min_size), math.log(scenario.max_size)))))
        positives = int(rng.binomial(size, rng.uniform(scenario.min_prevalence, scenario.max_prevalence)))
        negatives = size - positives
        tp = int(rng.binomial(positives, 1 / (1 + math.exp(-thetas[i, 0]))))
        fp = int(rng.binomial(negatives, 1 / (1 + math.exp(-thetas[i, 1]))))
        read = int(round(size / (1 - sum(scenario.exclusion_rates))))
        excluded = [int(rng.binomial(read, rate)) for rate in scenario.exclusion_rates]
        tables.append(
            release_table(
                f"site-{i + 1:02d}",
                tp,
                fp,
                positives - tp,
                negatives - fp,
                excluded,
                scenario.min_cell_size,
                scenario.allow_zero,
            )
        )
    return tables


SCENARIOS = (
    Scenario(),
    Scenario(
        name="screening",
        sensitivity=0.80,
        specificity=0.90,
        sd_logit_sensitivity=0.4,
        sd_logit_fpr=0.4,
        correlation=-0.2,
        sites=20,
        min_size=30,
        max_size=400,
        min_prevalence=0.02,
        max_prevalence=0.15,
    ),
    Scenario(name="few sites", sites=8, min_size=60, max_size=600, min_prevalence=0.15, max_prevalence=0.40),
    # Many sites of moderate size, more heterogeneity and a strong threshold effect (sensitivity and false-positive
    # rate rising together): where t(k-2) and the normal quantile nearly agree.
    Scenario(
        name="many sites",
        sensitivity=0.75,
        specificity=0.85,
        sd_logit_sensitivity=0.7,
        sd_logit_fpr=0.5,
        correlation=0.5,
        sites=30,
        min_size=50,
        max_size=800,
        min_prevalence=0.05,
        max_prevalence=0.30,
    ),
)


def _logit(p: float) -> float:
    return math.log(p / (1 - p))


def _univariate(tables: list[ReleasedTable]) -> dict[str, Any]:
    complete = [t for t in tables if t.is_complete and t.tp + t.fn > 0 and t.fp + t.tn > 0]  # type: ignore[operator]
    if len(complete) < 2:
        raise PoolingError("fewer than 2 complete tables")
    out: dict[str, Any] = {"sites": len(complete)}
    for measure, (events, others) in (("sensitivity", ("tp", "fn")), ("specificity", ("tn", "fp"))):
        y, v = [], []
        for t in complete:
            a, b = float(getattr(t, events)), float(getattr(t, others))
            if min(t.cells) == 0:  # type: ignore[type-var]
                a, b = a + 0.5, b + 0.5
            y.append(math.log(a / b))
            v.append(1 / a + 1 / b)
        pooled = random_effects(y, v, method="DL", tau2_interval=False)
        out[measure] = (pooled.estimate, pooled.ci_low, pooled.ci_high)
    return out


def _logit_interval(centre: float, se: float, quantile: float) -> tuple[float, float, float]:
    return (centre, centre - quantile * se, centre + quantile * se)


def _logit_triple(interval: Any) -> tuple[float, float, float]:
    return tuple(_logit(v) for v in (interval.estimate, interval.ci_low, interval.ci_high))  # type: ignore[return-value]


def _not_estimable_reason(head: Any) -> str:
    """The headline's first "not estimable" reason for the summary point, without site names or numbers."""
    for name in ("sensitivity", "specificity"):
        if name in head.not_estimable:
            return str(head.not_estimable[name])
    return "not estimable: no summary point"


def _plain_profile(tables: list[ReleasedTable], head: Any) -> dict[str, Any] | None:
    """The headline's profile-likelihood interval with the chi-squared(1) cut-off instead of t(k-2).

    The same model refitted; each limit is where the signed root of the likelihood-ratio statistic, maximised
    over the other four parameters, equals the normal quantile, found by Brent's method between the estimate
    and the headline's t(k-2) limit (the signed root is monotone there and reaches t(k-2) > z at that limit).
    ``None`` when a limit cannot be bracketed (the t(k-2) limit stopped at a parameter bound).
    """
    evidence, excluded = glmm_evidence(tables, "censor", minimum=0)
    _, likelihood, theta, nll_hat, free, _ = glmm_fit(evidence, tables, excluded)
    z = float(stats.norm.isf(0.025))
    out: dict[str, Any] = {"sites": len(evidence)}
    for measure, index in (("sensitivity", 0), ("specificity", 1)):
        interval = getattr(head, measure)
        # the headline's limits on the model's scale: logit sensitivity, logit false-positive rate
        limits = (
            (_logit(interval.ci_low), _logit(interval.ci_high))
            if index == 0
            else (-_logit(interval.ci_high), -_logit(interval.ci_low))
        )
        others = [i for i in free if i != index]
        centre = float(theta[index])

        def signed_root(value: float, index: int = index, others: list[int] = others, centre: float = centre) -> float:
            start = theta.copy()
            start[index] = value
            _, nll, _ = likelihood.maximise(start, others, tolerance=1e-9, gtol=1e-5, maxiter=200)
            return math.copysign(math.sqrt(max(0.0, 2.0 * (nll - nll_hat))), value - centre)

        try:
            low = optimize.brentq(lambda v: signed_root(v) + z, limits[0], centre, xtol=1e-3)
            high = optimize.brentq(lambda v: signed_root(v) - z, centre, limits[1], xtol=1e-3)
        except ValueError:
            return None
        out[measure] = (centre, low, high) if index == 0 else (-centre, -high, -low)
    return out


def run_one(args: tuple[Scenario, int] | tuple[Scenario, int, bool]) -> dict[str, Any]:
    """One consortium: its suppression pattern and each row's logit-scale (estimate, low, high) per measure.

    Specificity is carried as logit specificity. A row is missing where its fit failed or was declared not
    estimable; ``not_estimable`` holds the headline's reason then. ``seconds`` is the CPU time it took. A third
    item ``True`` adds the :data:`COMPARISON` row.
    """
    scenario, seed = args[0], args[1]
    compare = len(args) > 2 and bool(args[2])
    started = time.process_time()
    rng = np.random.default_rng(seed)
    tables = consortium(scenario, rng)
    row: dict[str, Any] = {"suppressed_sites": sum(1 for t in tables if not t.is_complete)}
    z = float(stats.norm.isf(0.025))
    try:
        head = headline_accuracy(tables, intervals=False)
    except PoolingError as error:  # never expected: the headline says "not estimable" instead of raising
        row["not_estimable"] = f"failed: {error}"
        head = None
    if head is not None and head.sensitivity is not None and head.specificity is not None and head.fit is not None:
        fit = head.fit
        k = len(head.sites_pooled)
        row["headline"] = {
            "sites": k,
            "sensitivity": _logit_triple(head.sensitivity),
            "specificity": _logit_triple(head.specificity),
        }
        for label, q in (
            ("glmm_censored|Wald, t(k-2)", float(stats.t.isf(0.025, k - 2))),
            ("glmm_censored|Wald, z", z),
        ):
            row[label] = {
                "sites": fit.n_sites,
                "sensitivity": _logit_interval(fit.mean_logit_sensitivity, fit.se_logit_sensitivity, q),
                "specificity": _logit_interval(-fit.mean_logit_fpr, fit.se_logit_fpr, q),
            }
        if compare:
            try:
                plain = _plain_profile(tables, head)
            except PoolingError:
                plain = None
            if plain is not None:
                row[row_key(*COMPARISON)] = plain
    elif head is not None:
        row["not_estimable"] = _not_estimable_reason(head)
    for name, build in (
        ("glmm_drop|Wald, t(k-2)", lambda: glmm_accuracy(tables, suppressed="drop", interval="t")),
        ("reitsma_drop|Wald, z", lambda: reitsma(tables)),
    ):
        try:
            fit = build()
        except PoolingError:
            continue
        q = float(stats.t.isf(0.025, max(fit.n_sites - 2, 1))) if name.startswith("glmm") else z
        row[name] = {
            "sites": fit.n_sites,
            "sensitivity": _logit_interval(fit.mean_logit_sensitivity, fit.se_logit_sensitivity, q),
            "specificity": _logit_interval(-fit.mean_logit_fpr, fit.se_logit_fpr, q),
        }
    try:
        row["univariate_drop|Wald, z"] = _univariate(tables)
    except PoolingError:
        pass
    row["seconds"] = time.process_time() - started
    return row


def _worker() -> None:
    """One BLAS thread per process: the fits are small, and threads of two processes on two cores contend."""
    threadpool_limits(1)


def row_key(method: str, interval: str) -> str:
    """Where one consortium's result keeps a row: the headline's own interval as ``headline``."""
    return method if (method, interval) == ROWS[0] else f"{method}|{interval}"


def summarise(rows: list[dict[str, Any]], scenario: Scenario) -> dict[str, Any]:
    truth = {"sensitivity": scenario.mean[0], "specificity": -scenario.mean[1]}
    out: dict[str, Any] = {}
    compared = any(row_key(*COMPARISON) in r for r in rows)
    for method, interval in (*ROWS[:1], COMPARISON, *ROWS[1:]) if compared else ROWS:
        fits = [r[row_key(method, interval)] for r in rows if row_key(method, interval) in r]
        entry: dict[str, Any] = {
            "interval": interval,
            "fits": len(fits),
            "failed_or_not_estimable": len(rows) - len(fits),
        }
        if fits:
            entry["mean_sites_pooled"] = float(np.mean([f["sites"] for f in fits]))
            for measure, target in truth.items():
                est, low, high = (np.array([f[measure][j] for f in fits]) for j in range(3))
                p_true = float(special.expit(target))
                p_est = special.expit(est)
                covered = (low <= target) & (target <= high)
                n = covered.size
                entry[measure] = {
                    "truth": p_true,
                    "bias": float(p_est.mean() - p_true),
                    "bias_mcse": float(p_est.std(ddof=1) / math.sqrt(n)) if n > 1 else None,
                    "rmse": float(np.sqrt(np.mean((p_est - p_true) ** 2))),
                    "coverage": float(covered.mean()),
                    "coverage_mcse": float(math.sqrt(max(covered.mean() * (1 - covered.mean()), 1e-12) / n)),
                    "mean_ci_width": float(np.mean(special.expit(high) - special.expit(low))),
                }
        out[f"{method} [{interval}]"] = entry
    return out


def print_table(summary: dict[str, Any], rows: list[dict[str, Any]], scenario: Scenario, seconds: float) -> None:
    suppressed = np.array([r["suppressed_sites"] for r in rows])
    print(
        f"\nscenario {scenario.name!r}: {len(rows)} consortia of {scenario.sites} sites ({scenario.min_size}-"
        f"{scenario.max_size} participants, prevalence {scenario.min_prevalence:g}-{scenario.max_prevalence:g}); "
        f"true sensitivity {scenario.sensitivity}, specificity {scenario.specificity}; sites with withheld cells "
        f"per consortium: mean {suppressed.mean():.1f} of {scenario.sites}; {seconds:.0f} s"
    )
    header = (
        f"{'method':<17}{'interval':<17}{'fits':>5}{'sites':>6}  {'measure':<12}{'bias':>8}{'(MCSE)':>8}"
        f"{'rmse':>7}{'coverage':>10}{'(MCSE)':>7}{'width':>7}"
    )
    print(header)
    print("-" * len(header))
    for name, entry in summary.items():
        method, interval = name.split(" [")[0], entry["interval"]
        for measure in ("sensitivity", "specificity"):
            if measure not in entry:
                print(f"{method:<17}{interval:<17}{entry['fits']:>5}  (no fit)")
                break
            m = entry[measure]
            print(
                f"{method:<17}{interval:<17}{entry['fits']:>5}{entry['mean_sites_pooled']:>6.1f}  {measure:<12}"
                f"{m['bias']:>+8.4f}{m['bias_mcse']:>8.4f}{m['rmse']:>7.4f}{100 * m['coverage']:>9.1f}%"
                f"{100 * m['coverage_mcse']:>6.1f}%{m['mean_ci_width']:>7.3f}"
            )
    for reason, count in _reasons(rows).items():
        print(f"headline not estimable in {count} of {len(rows)}: {reason}")


def _reasons(rows: list[dict[str, Any]]) -> dict[str, int]:
    """How often each "not estimable" reason of the headline fired."""
    counts: dict[str, int] = {}
    for row in rows:
        if "not_estimable" in row:
            counts[row["not_estimable"]] = counts.get(row["not_estimable"], 0) + 1
    return dict(sorted(counts.items(), key=lambda item: -item[1]))


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--consortia", type=int, default=300, help="synthetic consortia per scenario (default 300)")
    parser.add_argument("--quick", action="store_true", help="60 consortia per scenario (about a CPU-minute)")
    parser.add_argument("--scenario", action="append", help="run only this scenario (repeatable)")
    parser.add_argument("--seed", type=int, default=20260, help="master seed")
    parser.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1), help="processes")
    parser.add_argument(
        "--compare-reference",
        action="store_true",
        help="add the headline's profile interval with the chi-squared(1) cut-off (about twice the time)",
    )
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="where to write the JSON results")
    args = parser.parse_args(argv)
    consortia = 60 if args.quick else args.consortia
    if consortia < 2:
        parser.error("--consortia must be at least 2")
    chosen = [s for s in SCENARIOS if not args.scenario or s.name in args.scenario]
    if not chosen:
        parser.error(f"--scenario must be one of: {', '.join(s.name for s in SCENARIOS)}")
    results: list[dict[str, Any]] = []
    begun = time.perf_counter()
    pool = ProcessPoolExecutor(args.workers, initializer=_worker) if args.workers > 1 else None
    if pool is None:
        _worker()
    try:
        for scenario in chosen:
            # Seeds follow the scenario's place in SCENARIOS, so a scenario run alone repeats the full run's.
            number = SCENARIOS.index(scenario)
            seeds = np.random.SeedSequence([args.seed, number]).generate_state(consortia, dtype=np.uint64)
            jobs = [(scenario, int(s), args.compare_reference) for s in seeds]
            started = time.perf_counter()
            rows = []
            for row in pool.map(run_one, jobs, chunksize=2) if pool else map(run_one, jobs):
                rows.append(row)
                if len(rows) % max(1, consortia // 10) == 0 and len(rows) < consortia:
                    print(f"  {scenario.name}: {len(rows)} of {consortia}", file=sys.stderr, flush=True)
            seconds = time.perf_counter() - started
            summary = summarise(rows, scenario)
            print_table(summary, rows, scenario, seconds)
            results.append(
                {
                    "scenario": {
                        **{k: v for k, v in scenario.__dict__.items() if not isinstance(v, tuple)},
                        "exclusion_rates": dict(zip(REASONS, scenario.exclusion_rates, strict=True)),
                    },
                    "consortia": consortia,
                    "seconds": round(seconds, 1),
                    "cpu_seconds": round(float(sum(r["seconds"] for r in rows)), 1),
                    "withheld_sites_per_consortium": float(np.mean([r["suppressed_sites"] for r in rows])),
                    "not_estimable": _reasons(rows),
                    "methods": summary,
                }
            )
            # Written after every scenario, so that a long run stopped part-way keeps what it finished.
            document = {
                "seed": args.seed,
                "workers": args.workers,
                "complete": len(results) == len(chosen),
                "minutes": round((time.perf_counter() - begun) / 60, 1),
                "scenarios": results,
            }
            args.out.write_text(json.dumps(document, indent=2) + "\n")
    finally:
        if pool is not None:
            pool.shutdown()
    print(f"\n{(time.perf_counter() - begun) / 60:.1f} min in all")
    print(f"results: {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
