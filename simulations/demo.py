"""The demo: the invented consortium's whole study, from a signed model to the pooled table.

Steps (each the same code the command lines run):
1. generate the invented consortium (simulations.consortium);
2. coordinator: make keys, train and freeze the demo model, pack and sign it, issue a request;
3. each site: `site-agent init` (policy, keys, pinned coordinator key) and point [data] at its records;
   the coordinator enrols every site's release-signing key;
4. run the request at every site over the chosen engine: Flower's simulation engine (default),
   the Flower apps in-process, or the offline path (release files handed over);
5. analyse the store and print the per-site and pooled table.
"""

from __future__ import annotations

import logging
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from federation.analysis import analyze
from federation.cli import format_table
from federation.flower_server import RoundConfig, SiteOutcome, make_server_app
from federation.modelpack import bundle_from_sklearn, onnx_from_sklearn
from federation.protocol import Schema, load_private_key, write_keypair
from federation.protocol.cli_support import write_atomic
from federation.store import Store
from federation.study import issue_request
from site_agent.approval import record_sent
from site_agent.config import init_site, load_site
from site_agent.flower_client import make_client_app
from site_agent.runner import run_request

from .consortium import Consortium, train_demo_model, write_consortium

STUDY_ID = "tallowmere-validation-1"


@dataclass(frozen=True)
class DemoStudy:
    root: Path
    consortium: Consortium
    store_path: Path
    bundle_bytes: bytes
    request_bytes: bytes
    site_dirs: tuple[Path, ...]


def set_site_data(site_dir: Path, data_path: Path, mapping_path: Path) -> None:
    """Point a site's [data] table at its records (what site IT does by editing site.toml)."""
    config = site_dir / "site.toml"
    text = config.read_text()
    text = text.replace('# path = "data.csv"', f'path = "{data_path.resolve()}"')
    text = text.replace('# mapping = "mapping.toml"', f'mapping = "{mapping_path.resolve()}"')
    config.write_text(text)


def prepare_study(root: Path, seed: int = 2026, study_id: str = STUDY_ID) -> DemoStudy:
    if root.exists():
        shutil.rmtree(root)
    consortium = write_consortium(root / "consortium", seed)
    coordinator = root / "coordinator"
    private_path, public_path = write_keypair(coordinator, "coordinator")
    private_key = load_private_key(private_path)
    schema = Schema.from_toml(consortium.schema_path.read_text(), str(consortium.schema_path))
    model = train_demo_model(consortium.development_path)
    bundle_bytes = bundle_from_sklearn(model, schema, private_key, threshold=0.5, name="tallowmere-demo-screen")
    # The frozen model as a plain ONNX file too, so the README's by-hand sequence can pack it again.
    write_atomic(coordinator / "model.onnx", onnx_from_sklearn(model, len(schema.features)))
    write_atomic(coordinator / "model.bundle", bundle_bytes)
    store_path = coordinator / "study.db"
    store = Store(store_path)
    request_bytes = issue_request(store, study_id, bundle_bytes, private_key)
    write_atomic(coordinator / "request.json", request_bytes)
    site_dirs = []
    for site in consortium.sites:
        site_dir = init_site(root / "site-folders" / site.site_id, site.site_id, [public_path])
        set_site_data(site_dir, site.data_path, site.mapping_path)
        store.enrol(site.site_id, (site_dir / "site.pub").read_bytes(), str(site_dir / "site.pub"))
        site_dirs.append(site_dir)
    store.close()
    return DemoStudy(root, consortium, store_path, bundle_bytes, request_bytes, tuple(site_dirs))


def run_offline(study: DemoStudy) -> list[SiteOutcome]:
    """Each site answers from the command-line path; the coordinator ingests the release files."""
    outcomes, files = [], []
    for index, site_dir in enumerate(study.site_dirs):
        site = load_site(site_dir)
        result = run_request(site, study.request_bytes, study.bundle_bytes)
        path = study.root / "releases" / f"{site.site_id}.json"
        write_atomic(path, result.release_bytes)
        record_sent(site, result.release_bytes, "file", path)
        files.append((result.release_bytes, str(path)))
        outcomes.append(SiteOutcome(index + 1, site.site_id, "released"))
    store = Store(study.store_path)
    store.ingest(files)
    store.close()
    return outcomes


def round_config(study: DemoStudy) -> RoundConfig:
    return RoundConfig(
        store_path=study.store_path,
        request_bytes=study.request_bytes,
        bundle_bytes=study.bundle_bytes,
        min_sites=len(study.site_dirs),
        wait_for_sites_s=120.0,
        deadline_s=600.0,
    )


def run_flower_inprocess(study: DemoStudy) -> list[SiteOutcome]:
    from .inprocess import run_inprocess

    outcomes: list[SiteOutcome] = []
    server = make_server_app(round_config(study), outcomes.extend)
    run_inprocess(server, make_client_app(), study.site_dirs)
    return outcomes


def simulate(server: object, client: object, num_supernodes: int) -> None:
    """Flower's simulation engine (Ray) on this machine's CPUs, with Ray's own temp dir, removed afterwards."""
    import ray
    from flwr.simulation import run_simulation

    ray_tmp = tempfile.mkdtemp(prefix="msv-ray-", dir="/tmp")
    # Flower announces run_simulation's deprecation and Ray a GPU tip on every run; neither helps a user here.
    logging.getLogger("flwr").setLevel(logging.ERROR)
    os.environ.setdefault("RAY_ACCEL_ENV_VAR_OVERRIDE_ON_ZERO", "0")
    try:
        run_simulation(
            server_app=server,
            client_app=client,
            num_supernodes=num_supernodes,
            backend_config={
                "init_args": {
                    "address": "local",
                    "num_cpus": min(2, os.cpu_count() or 1),
                    "include_dashboard": False,
                    "_temp_dir": ray_tmp,
                    "logging_level": "error",
                },
                "client_resources": {"num_cpus": 1, "num_gpus": 0.0},
            },
        )
    finally:
        if ray.is_initialized():
            ray.shutdown()
        shutil.rmtree(ray_tmp, ignore_errors=True)


def run_flower_simulation(study: DemoStudy) -> list[SiteOutcome]:
    """Flower's simulation engine (Ray), one virtual SuperNode per site."""
    outcomes: list[SiteOutcome] = []
    server = make_server_app(round_config(study), outcomes.extend)
    simulate(server, make_client_app([str(d) for d in study.site_dirs]), len(study.site_dirs))
    return outcomes


ENGINES = {"simulation": run_flower_simulation, "inprocess": run_flower_inprocess, "offline": run_offline}


def run_demo(out: Path, engine: str = "simulation", seed: int = 2026) -> int:
    started = time.monotonic()
    print(f"Preparing the invented demo consortium in {out} ...", flush=True)
    study = prepare_study(Path(out), seed)
    print(f"Running study {STUDY_ID} at {len(study.site_dirs)} sites over the {engine} engine ...", flush=True)
    outcomes = ENGINES[engine](study)
    for outcome in outcomes:
        note = f" ({outcome.reason})" if outcome.reason else ""
        print(f"  {outcome.site_id or f'node {outcome.node_id}'}: {outcome.status}{note}")
    result = analyze(Store(study.store_path), STUDY_ID)
    print()
    print(format_table(result))
    print()
    print(f"store:    {study.store_path}")
    print(f"request:  {study.root / 'coordinator' / 'request.json'}")
    print(f"sites:    {study.root / 'site-folders'} (each with its ledger and releases/)")
    from federation.report import write_report  # imported here: matplotlib loads only when a report is drawn

    report_path = study.root / "report.html"
    write_report(study.store_path, report_path, STUDY_ID)
    print(f"report:   {report_path} (open it in any browser; it fetches nothing)")
    print(f"finished in {time.monotonic() - started:.1f} s")
    print("Screening is not diagnosis; these figures do not replace clinical judgement, local regulation")
    print("or ethics approval. All data in this demo is invented.")
    released = sum(o.status == "released" for o in outcomes)
    return 0 if released == len(study.site_dirs) else 3


if __name__ == "__main__":
    sys.exit(run_demo(Path(sys.argv[1] if len(sys.argv) > 1 else "demo-output")))
