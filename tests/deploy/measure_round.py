"""Measure once: a validation round against a readiness check of the same sites, on loopback.

Not collected by pytest (a measurement, not a check). Run with
``.venv/bin/python -m tests.deploy.measure_round [--sites N] [--rounds N] [--out DIR] [--cold-start]``. It
starts a TLS SuperLink and N authenticated SuperNodes (the invented consortium's first N of 8 sites, plus
sites reading two sites' data under new site ids beyond 8; each ClientApp a warm copy unless
``--cold-start``), then alternates a readiness check (``federation run --ping``: every node starts its
ClientApp, checks its folder, keys and data source without reading a record, and answers) and a validation
round (a fresh request each time), and prints the wall time of each, the ratio of medians and the
SuperLink's peak memory. Every process is stopped by PID at the end. The agent's modules are compiled to
bytecode first, as an installed agent's are (:func:`compile_bytecode`).
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
from pathlib import Path

from federation.deploy.commands import enrol_node_key
from federation.deploy.runs import RunOptions, run_study
from federation.protocol import load_private_key
from federation.protocol.app_bundle import build_app_bundle
from federation.protocol.cli_support import write_atomic
from federation.store import Store
from federation.study import issue_request
from simulations.demo import prepare_study, set_site_data
from site_agent.config import init_site
from site_agent.models import approve_bundle

from .harness import BIN, Fleet, free_port, port_listening, processes_under, wait_until

EXTRA_SITES = (("northvale-annex", "northvale-community"), ("quillbrook-annex", "quillbrook-community"))


def _peak_rss_mib(pids: list[int]) -> float:
    """Sum of the peak resident memory (VmHWM) of the given processes, in MiB."""
    total = 0.0
    for pid in pids:
        try:
            for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                if line.startswith("VmHWM:"):
                    total += int(line.split()[1]) / 1024
        except OSError:
            continue
    return round(total, 1)


def compile_bytecode() -> None:
    """Compile the agent's and the coordinator's modules, as ``pip install`` does for an installed package.

    A site runs an installed agent, whose modules load from bytecode. This checkout is an editable install,
    and with ``PYTHONDONTWRITEBYTECODE`` set (as on the build machine) every ClientApp process would compile
    each module it imports from source (about 0.05 s of CPU for a readiness check, 0.1-0.2 s for a validation).
    """
    import compileall

    import federation
    import site_agent

    for package in (federation, site_agent):
        compileall.compile_dir(str(Path(package.__file__).parent), quiet=1)


def measure(out: Path, rounds: int, task_poll: str, n_sites: int = 10, cold_start: bool = False) -> dict:
    compile_bytecode()
    study = prepare_study(out / "study")
    coordinator = study.root / "coordinator"
    sites = {d.name: d for d in study.site_dirs[:n_sites]}
    store = Store(study.store_path)
    for new_id, like in EXTRA_SITES[: max(0, n_sites - len(sites))]:
        folder = init_site(study.root / "site-folders" / new_id, new_id, [coordinator / "coordinator.pub"])
        source = next(s for s in study.consortium.sites if s.site_id == like)
        set_site_data(folder, source.data_path, source.mapping_path)
        approve_bundle(folder, study.bundle_bytes, "site IT")
        store.enrol(new_id, (folder / "site.pub").read_bytes(), "site.pub")
        sites[new_id] = folder
    store.close()
    digest = build_app_bundle().sha256
    for folder in sites.values():
        config = folder / "site.toml"
        config.write_text(config.read_text().replace("allowed_fab_sha256 = []", f'allowed_fab_sha256 = ["{digest}"]'))
    fleet = Fleet(out)
    port = free_port()
    result = fleet.run([str(BIN / "federation"), "certs", "new", "--out-dir", str(coordinator / "certs")], 60)
    assert result.returncode == 0, result.stderr
    times: dict[str, list[float]] = {"ping": [], "validate": []}
    try:
        serve = [str(BIN / "federation"), "serve", "--study-dir", str(coordinator), "--port", str(port)]
        fleet.start("superlink", [*serve, "--task-poll", task_poll])
        wait_until(lambda: port_listening(port), 60, "the SuperLink")
        store = Store(study.store_path)
        for name, folder in sites.items():
            enrol_node_key(store, name, folder / "node.pub")
        store.close()
        for name, folder in sites.items():
            fleet.start(
                f"join-{name}",
                [
                    str(BIN / "site-agent"),
                    "join",
                    "--superlink",
                    f"127.0.0.1:{port}",
                    "--site-dir",
                    str(folder),
                    "--root-certificates",
                    str(coordinator / "certs" / "ca.crt"),
                    "--task-poll",
                    task_poll,
                    *(["--cold-start"] if cold_start else []),
                ],
            )
        # --sign as a coordinator runs it: both kinds of round carry the sites' signed acknowledgements.
        signing = coordinator / "coordinator.key"
        options = RunOptions(study=coordinator, deadline_s=300, sign_key=signing)
        ping_options = RunOptions(study=coordinator, deadline_s=300, kind="ping", sign_key=signing)
        first = run_study(ping_options, lambda line: None)
        assert first.state == "complete" and first.ready == len(sites), first.to_dict()  # warm-up: all ready
        key = load_private_key(coordinator / "coordinator.key")
        for index in range(rounds):
            ping = run_study(ping_options, lambda line: None)
            assert ping.state == "complete" and ping.ready == len(sites), ping.to_dict()
            times["ping"].append(ping.wall_s)
            store = Store(study.store_path)
            document = issue_request(store, f"measure-{index}", study.bundle_bytes, key)
            store.close()
            write_atomic(coordinator / "request.json", document)
            validate = run_study(options, lambda line: None)
            assert validate.state == "complete" and validate.released == len(sites), validate.to_dict()
            times["validate"].append(validate.wall_s)
            print(f"round {index + 1}: floor {ping.wall_s:.2f} s, validation {validate.wall_s:.2f} s", flush=True)
        link_pid = fleet.procs["superlink"].pid
        superlink_rss = _peak_rss_mib([link_pid])
    finally:
        fleet.stop_all()
        wait_until(lambda: not processes_under(out), 30, "every process to exit")
    floor, validation = statistics.median(times["ping"]), statistics.median(times["validate"])
    return {
        "sites": len(sites),
        "clientapp_start": "cold" if cold_start else "warm",
        "superlink_peak_rss_mib": superlink_rss,
        "rounds": rounds,
        "task_poll_s": float(task_poll),
        "floor_s": times["ping"],
        "validation_s": times["validate"],
        "median_floor_s": round(floor, 2),
        "median_validation_s": round(validation, 2),
        "ratio": round(validation / floor, 2),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--sites", type=int, default=10, help="how many sites (8 consortium sites, then copies)")
    parser.add_argument("--task-poll", default="0.2", help="app runners' task polling in seconds (Flower: 1)")
    parser.add_argument("--out", type=Path, help="working folder (default: a new temporary folder)")
    parser.add_argument("--cold-start", action="store_true", help="join every site with --cold-start")
    args = parser.parse_args()
    out = args.out or Path(tempfile.mkdtemp(prefix="msv-measure-"))
    print(json.dumps(measure(out, args.rounds, args.task_poll, args.sites, args.cold_start), indent=2))


if __name__ == "__main__":
    main()
