"""Federation: a validation round over Flower against a trivial-query round on the same engine (the floor).

Simulation engine: 20, 100, 200 and 500 virtual sites, each with a site folder of its own (keys, policy, ledger)
reading a tiny file (200 generated records), so the cost measured is the engine's and the protocol's, not
the data's. The *floor* is the same engine, the same number of virtual nodes and the same polling, but a
ClientApp that answers a trivial query at once. Each round runs in a fresh interpreter with its own Ray
instance; the time reported is the round inside the ServerApp (engine start-up excluded) and the whole
``run_simulation`` call (start-up included).

Deployment (``BENCH_DEPLOY=1``): 3 and 10 sites on loopback over TLS, with :mod:`tests.deploy.measure_round`
(a readiness check, ``federation run --ping``, of the same sites as the floor).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from ..demo import simulate
from .common import median, report, run_child, say
from .site_path import prepare, write_files

SITE_RECORDS = 200
POLL_S = 0.2


def _sites(work: Path, n: int) -> tuple[Path, bytes, bytes, list[Path]]:
    """A fresh store with ``n`` enrolled site folders and a new request; returns (store, request, bundle, dirs)."""
    from federation.protocol import load_private_key
    from federation.store import Store
    from federation.study import issue_request
    from site_agent.config import init_site

    base = prepare(work)
    data, _ = write_files(work, SITE_RECORDS)
    root = Path(tempfile.mkdtemp(prefix=f"fed-{n}-", dir=work))
    store_path = root / "study.db"
    store = Store(store_path)
    dirs = []
    for i in range(n):
        site_id = f"site-{i:03d}"
        folder = init_site(root / site_id, site_id, [base / "coordinator" / "coordinator.pub"])
        config = folder / "site.toml"  # the file's columns are named as the schema: the default mapping
        config.write_text(config.read_text().replace('# path = "data.csv"', f'path = "{data.resolve()}"'))
        store.enrol(site_id, (folder / "site.pub").read_bytes(), "site.pub")
        dirs.append(folder)
    bundle = (base / "model.bundle").read_bytes()
    from site_agent.models import approve_bundle

    for folder in dirs:
        approve_bundle(folder, bundle, "bench")
    key = load_private_key(base / "coordinator" / "coordinator.key")
    request = issue_request(store, f"bench-{n}-{time.time_ns()}", bundle, key)
    store.close()
    return store_path, request, bundle, dirs


def _ping_apps(n: int, times: dict[str, float]) -> tuple[Any, Any]:
    from flwr.app import ConfigRecord, Context, Message, RecordDict
    from flwr.clientapp import ClientApp
    from flwr.serverapp import Grid, ServerApp

    server, client = ServerApp(), ClientApp()

    @client.query("ping")
    def pong(message: Message, context: Context) -> Message:
        return Message(RecordDict({"result": ConfigRecord({"status": "answered"})}), reply_to=message)

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        times["start"] = time.perf_counter()
        nodes: list[int] = []
        while len(nodes) < n:
            nodes = sorted(grid.get_node_ids())
            if len(nodes) < n:
                time.sleep(POLL_S)
        content = RecordDict({"ping": ConfigRecord({"round": "floor"})})
        pending = set(grid.push_messages([Message(content, dst_node_id=m, message_type="query.ping") for m in nodes]))
        while pending:
            for reply in grid.pull_messages(list(pending)):
                pending.discard(reply.metadata.reply_to_message_id)
            if pending:
                time.sleep(POLL_S)
        times["end"] = time.perf_counter()

    return server, client


def _validate_apps(n: int, work: Path, times: dict[str, float], outcomes: list[Any]) -> tuple[Any, Any]:
    from flwr.app import Context
    from flwr.serverapp import Grid, ServerApp

    from federation.flower_server import RoundConfig, run_round
    from site_agent.flower_client import make_client_app

    store_path, request, bundle, dirs = _sites(work, n)
    config = RoundConfig(store_path, request, bundle, min_sites=n, wait_for_sites_s=600, deadline_s=1800, poll_s=POLL_S)
    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        times["start"] = time.perf_counter()
        outcomes.extend(run_round(grid, config))
        times["end"] = time.perf_counter()

    return server, make_client_app([str(d) for d in dirs])


def child(kind: str, n: int, work: Path) -> None:
    times: dict[str, float] = {}
    outcomes: list[Any] = []
    server, client = _ping_apps(n, times) if kind == "ping" else _validate_apps(n, work, times, outcomes)
    started = time.perf_counter()
    simulate(server, client, n)
    total = time.perf_counter() - started
    released = sum(o.status == "released" for o in outcomes)
    if kind != "ping" and released != n:
        raise RuntimeError(f"only {released} of {n} sites released: {[o.reason for o in outcomes][:3]}")
    report({"round_s": round(times["end"] - times["start"], 3), "total_s": round(total, 3), "released": released})


def run_simulation_engine(work: Path, sizes: tuple[int, ...], repeats: int = 1) -> list[dict[str, Any]]:
    prepare(work)
    write_files(work, SITE_RECORDS)
    rows = []
    for n in sizes:
        ping, validate = [], []
        for _ in range(repeats):
            ping.append(run_child(__name__, ["ping", str(n), str(work)]))
            validate.append(run_child(__name__, ["validate", str(n), str(work)]))
        row = {
            "engine": "simulation",
            "sites": n,
            "floor_round_s": median([p["round_s"] for p in ping]),
            "validation_round_s": median([v["round_s"] for v in validate]),
            "floor_total_s": median([p["total_s"] for p in ping]),
            "validation_total_s": median([v["total_s"] for v in validate]),
            "repeats": repeats,
        }
        row["ratio"] = round(row["validation_round_s"] / row["floor_round_s"], 2)
        row["ratio_total"] = round(row["validation_total_s"] / row["floor_total_s"], 2)
        say(
            f"federation: {n:>4} virtual sites  round {row['validation_round_s']:.1f} s / floor "
            f"{row['floor_round_s']:.1f} s = {row['ratio']:.2f}x (with engine start {row['ratio_total']:.2f}x)"
        )
        rows.append(row)
    return rows


def run_deployment(work: Path, sizes: tuple[int, ...] = (3, 10), rounds: int = 3) -> list[dict[str, Any]]:
    from tests.deploy.measure_round import measure

    rows = []
    for n in sizes:
        out = Path(tempfile.mkdtemp(prefix=f"deploy-{n}-", dir=work))
        result = measure(out, rounds, "0.2", n)
        row = {
            "engine": "deployment (TLS, loopback)",
            "clientapp_start": result["clientapp_start"],
            "sites": result["sites"],
            "floor_round_s": result["median_floor_s"],
            "validation_round_s": result["median_validation_s"],
            "ratio": result["ratio"],
            "superlink_peak_rss_mib": result["superlink_peak_rss_mib"],
            "repeats": rounds,
        }
        say(
            f"federation: {row['sites']:>4} sites deployed  {row['validation_round_s']:.1f} s / readiness check "
            f"{row['floor_round_s']:.1f} s = {row['ratio']:.2f}x"
        )
        rows.append(row)
    return rows


if __name__ == "__main__":
    child(sys.argv[1], int(sys.argv[2]), Path(sys.argv[3]))
