"""``make bench``: run every stage, print one table of ratios, write ``bench/results.json``.

``python -m simulations.bench [--quick] [--deploy] [--only STAGES] [--out bench/results.json] [--work DIR]``;
the Makefile passes ``--quick`` when ``BENCH_QUICK=1`` and ``--deploy`` when ``BENCH_DEPLOY=1``. Full run: site
path at 1M and 10M records, federation at 20, 100, 200 and 500 virtual sites. Quick run: 1M and 3M records, 20
and 100 sites. ``--deploy``: also 3 and 10 sites over a loopback TLS deployment. ``--only audit_history`` (a
comma-separated list of stages) runs those stages alone and replaces them in the ``--out`` file, keeping its
other stages; ``stages_rerun`` in the file says when, in which mode and under what load each was re-run.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from . import audit, federation, site_path, stats
from .common import ROOT, machine, say

STAGES = ("site_path", "audit", "audit_history", "stats", "headline", "federation", "deployment")


def _table(results: dict[str, Any]) -> str:
    lines = ["| stage | size | tool | baseline | ratio | target | peak RSS |", "| --- " * 7 + "|"]
    for row in results.get("site_path", []):
        lines.append(
            f"| site path, {row['format']} | {row['records']:,} records | {row['site_s']:.2f} s | "
            f"{row['bare_s']:.2f} s (pyarrow + numpy) | {row['ratio']:.2f}x (CPU {row['cpu_ratio']:.2f}x) | <= 1.3x | "
            f"{row['site_peak_rss_mib']:.0f} MiB (bare {row['bare_peak_rss_mib']:.0f}) |"
        )
    a = results.get("audit")
    if a:
        lines.append(
            f"| disclosure audit | {a['counts_in_release']} counts vs {a['earlier_releases']} releases"
            f"{' (' + str(a['refused_requests']) + ' requests refused)' if a.get('refused_requests') else ''} | "
            f"{a['protect_s']:.2f} s (LP audit {a['audit_s']:.2f} s) | {a['protect_alone_s']:.3f} s (no history) | "
            f"{a['ratio_to_alone']:.0f}x; {a['ratio_to_target']:.2f} of target | < 2 s | |"
        )
    h = results.get("audit_history")
    if h:
        for row in h["rows"]:
            ratio = f"{row['ratio_to_no_history']:.0f}x" if row.get("ratio_to_no_history") is not None else ""
            lines.append(
                f"| disclosure audit, site history | {h['counts_in_release']} counts vs {row['earlier_releases']} "
                f"audited releases of mixed analyses ({row['outcome']}) | {row['seconds']:.2f} s | "
                f"{h['rows'][0]['seconds']:.3f} s (no history) | {ratio} | < 10 s at 200 | |"
            )
        for refused in h.get("refused", []):  # a request refused against the whole history, after repair rounds
            lines.append(
                f"| disclosure audit, site history | request {refused['request']} ({refused['analyses']}) vs "
                f"{h['rows'][-1]['earlier_releases']} audited releases (refused) | {refused['seconds']:.2f} s | "
                f"{h['rows'][0]['seconds']:.3f} s (no history) | "
                f"{refused['seconds'] / max(h['rows'][0]['seconds'], 1e-3):.0f}x | | |"
            )
    for row in results.get("stats", []):
        lines.append(
            f"| univariate DL / REML | {row['sites']:,} sites | "
            f"{row['dl_s'] * 1e3:.2f} / {row['reml_s'] * 1e3:.2f} ms | "
            f"{row['statsmodels_dl_s'] * 1e3:.2f} / {row['statsmodels_pm_s'] * 1e3:.2f} ms (statsmodels DL / PM) | "
            f"{row['dl_ratio']:.2f}x / {row['reml_ratio']:.2f}x | | |"
        )
        lines.append(
            f"| bivariate REML / GLMM | {row['sites']:,} sites | "
            f"{row['bivariate_reml_s']:.3f} / {row['glmm_s']:.2f} s | "
            f"univariate DL | {row['bivariate_ratio_to_dl']:.0f}x / {row['glmm_ratio_to_dl']:.0f}x; REML "
            f"{row['bivariate_ratio_to_target']:.3f} of target | REML < 1 s at 1,000 | |"
        )
    headline = results.get("headline") or []
    for h in headline if isinstance(headline, list) else [headline]:
        tables = f", {h['tables']} ({h['sites_withholding']} withholding)" if "tables" in h else ""
        cpu = f" (CPU {h['headline_cpu_s']:.2f} s)" if "headline_cpu_s" in h else ""
        lines.append(
            f"| headline GLMM with profile intervals | {h['sites']} sites{tables} | {h['headline_s']:.2f} s{cpu} | "
            f"{h['glmm_s']:.2f} s (plain fit) | {h['ratio_to_plain_fit']:.1f}x; {h['ratio_to_target']:.2f} of target | "
            "< 5 s | |"
        )
    deployment = results.get("deployment", [])
    for row in [*results.get("federation", []), *(deployment if isinstance(deployment, list) else [deployment])]:
        deployed = row["engine"].startswith("deployment")
        target = "<= 1.3x" if deployed else ("<= 2x at 200" if row["sites"] == 200 else "")
        floor = "readiness check" if deployed else "trivial query"
        rss = row.get("superlink_peak_rss_mib") if deployed else None
        memory = f"SuperLink {rss:.0f} MiB" if rss is not None else ""
        lines.append(
            f"| federation, {row['engine']} | {row['sites']} sites | {row['validation_round_s']:.1f} s | "
            f"{row['floor_round_s']:.1f} s ({floor}) | {row['ratio']:.2f}x | {target} | {memory} |"
        )
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1M and 3M records; 20 and 100 virtual sites")
    parser.add_argument("--deploy", action="store_true", help="also 3 and 10 sites through a loopback deployment")
    parser.add_argument("--out", type=Path, default=ROOT / "bench" / "results.json")
    parser.add_argument("--work", type=Path, help="working folder (default: a new temporary folder, removed)")
    parser.add_argument("--records", help="comma-separated record counts (overrides --quick/full)")
    parser.add_argument("--sites", help="comma-separated virtual site counts (overrides --quick/full)")
    parser.add_argument(
        "--only", help=f"comma-separated stages to run alone, replaced in the --out file ({', '.join(STAGES)})"
    )
    args = parser.parse_args()
    only = set(args.only.split(",")) if args.only else None
    if only is not None and not only <= set(STAGES):
        parser.error(f"--only: unknown stage(s) {', '.join(sorted(only - set(STAGES)))}; stages: {', '.join(STAGES)}")
    records = (1_000_000, 3_000_000) if args.quick else (1_000_000, 10_000_000)
    sites = (20, 100) if args.quick else (20, 100, 200, 500)
    if args.records:
        records = tuple(int(x) for x in args.records.split(","))
    if args.sites:
        sites = tuple(int(x) for x in args.sites.split(","))
    work = args.work or Path(tempfile.mkdtemp(prefix="msv-bench-", dir="/tmp"))
    started = time.perf_counter()
    now = datetime.now(UTC).replace(microsecond=0).isoformat()
    results: dict[str, Any] = {"created_at": now, "mode": "quick" if args.quick else "full", "machine": machine()}
    if only is not None:  # the other stages stay as the earlier run measured them
        if args.out.exists():
            results = json.loads(args.out.read_text())
        results.setdefault("stages_rerun", {})
    args.out.parent.mkdir(parents=True, exist_ok=True)

    def stage(name: str, function: Any, *stage_args: Any) -> None:
        """Run one stage and save at once: its result, or its failure in one line (the other stages still run)."""
        if only is not None and name not in only:
            return
        if only is not None:
            results.get("failures", {}).pop(name, None)
            results["stages_rerun"][name] = {
                "created_at": now,
                "mode": "quick" if args.quick else "full",
                "load_average_at_start": [round(x, 2) for x in os.getloadavg()],
            }
        try:
            results[name] = function(*stage_args)
        except Exception as exc:  # a benchmark stage that fails is reported, and the others still run
            results.setdefault("failures", {})[name] = f"{type(exc).__name__}: {exc}"[:500]
            say(f"{name}: FAILED: {results['failures'][name]}")
        if only is not None:
            results["stages_rerun"][name]["load_average_at_end"] = [round(x, 2) for x in os.getloadavg()]
        args.out.write_text(json.dumps(results, indent=2) + "\n")

    try:
        stage("site_path", site_path.run, work, records, 1 if args.quick else 2)
        stage("audit", audit.run, work)
        stage("audit_history", audit.run_history, work, (0, 20) if args.quick else audit.HISTORY)
        stage("stats", stats.run)
        stage("headline", stats.run_headline)
        stage("federation", federation.run_simulation_engine, work, sites)
        if args.deploy or (only is not None and "deployment" in only):
            stage("deployment", federation.run_deployment, work)
    finally:
        if args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    if only is None:
        results["load_average_at_end"] = [round(x, 2) for x in os.getloadavg()]
        results["minutes"] = round((time.perf_counter() - started) / 60, 1)
    results["table"] = _table(results)
    args.out.write_text(json.dumps(results, indent=2) + "\n")
    m = results["machine"]
    print(
        f"Machine: {m['cores']} cores, {m['memory_gib']} GiB, {m['cpu_model']}, Python {m['python']}, "
        f"load {m['load_average_at_start']} at start"
    )
    print(results["table"])
    print(f"written: {args.out} ({round((time.perf_counter() - started) / 60, 1)} min)")
    say("")


if __name__ == "__main__":
    main()
