"""The demo: the invented consortium's whole study, from a signed model to the pooled results.

Steps (each the same code the command lines run):
1. generate the invented consortium (simulations.consortium);
2. coordinator: make keys, train and freeze the demo model, pack and sign it and the full-length
   instrument's scoring rule (a points scorecard), issue a request;
3. each site: `site-agent init` (policy, keys, pinned coordinator key), allow the subtype split, and point
   [data] at its records; the coordinator enrols every site's release-signing key;
4. run the request at every site over the chosen engine: Flower's simulation engine (default),
   the Flower apps in-process, or the offline path (release files handed over);
5. analyse the store, print every result in the order a validation paper reports them
   (:func:`simulations.summary.format_summary`), write the report and the tidy CSV export.

The full request (``request="full"``, what `make demo` runs) asks for the 2×2 table at the model's threshold
with the participant flow, ROC bands, calibration, subgroups by age band and by subtype, low-score margin
bands, agreement with the second reference standard, and the paired comparison with the full-length
instrument. ``request="primary"`` asks for the 2×2 table only (what many tests use: it is quick).
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

from federation.analysis import analyze, enrolled_without_release, release_sections
from federation.export import export_study
from federation.flower_server import RoundConfig, SiteOutcome, make_server_app
from federation.modelpack import bundle_from_sklearn, onnx_from_sklearn, pack_model
from federation.protocol import AnalysisSpec, Schema, load_private_key, sha256_hex, write_keypair
from federation.protocol.cli_support import write_atomic
from federation.protocol.documents import SubgroupSpec
from federation.store import Store
from federation.study import issue_request
from federation.summary import format_summary
from site_agent.approval import record_sent
from site_agent.config import init_site, load_site
from site_agent.flower_client import make_client_app
from site_agent.models import approve_bundle
from site_agent.runner import run_request

from .consortium import LONG_THRESHOLD, Consortium, train_demo_model, write_consortium

STUDY_ID = "tallowmere-validation-1"
AGE_EDGES = (36, 48)  # age bands in months: under 36, 36-47, 48 and over
MARGIN_DISTANCES = (0.05, 0.1, 0.2)  # distances from the threshold of the low-margin bands
SUBGROUP_VARIABLES = ("age_months", "sex", "subtype")  # what every demo site's policy allows


def full_request_specs(compare_sha256: str) -> tuple[AnalysisSpec, ...]:
    """Every analysis a validation paper reports, in the order it reports them."""
    return (
        AnalysisSpec("confusion"),
        AnalysisSpec("roc"),
        AnalysisSpec("calibration"),
        AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", AGE_EDGES), SubgroupSpec("subtype"))),
        AnalysisSpec("margin", bands=MARGIN_DISTANCES),
        AnalysisSpec("agreement"),
        AnalysisSpec("paired", compare_bundle_sha256=compare_sha256),
    )


@dataclass(frozen=True)
class DemoStudy:
    root: Path
    consortium: Consortium
    store_path: Path
    bundle_bytes: bytes
    request_bytes: bytes
    site_dirs: tuple[Path, ...]
    compare_bundle_bytes: bytes | None = None  # the full-length instrument's rule (a full request)


def set_site_data(site_dir: Path, data_path: Path, mapping_path: Path) -> None:
    """Point a site's [data] table at its records (what site IT does by editing site.toml)."""
    config = site_dir / "site.toml"
    text = config.read_text()
    text = text.replace('# path = "data.csv"', f'path = "{data_path.resolve()}"')
    text = text.replace('# mapping = "mapping.toml"', f'mapping = "{mapping_path.resolve()}"')
    config.write_text(text)


def allow_subgroups(site_dir: Path, variables: tuple[str, ...]) -> None:
    """Let requests split results by ``variables`` (the site's ethics board edits allowed_subgroups)."""
    config = site_dir / "site.toml"
    listed = ", ".join(f'"{v}"' for v in variables)
    config.write_text(
        config.read_text().replace('allowed_subgroups = ["age_months", "sex"]', f"allowed_subgroups = [{listed}]")
    )


def prepare_study(root: Path, seed: int = 2026, study_id: str = STUDY_ID, request: str = "primary") -> DemoStudy:
    """The consortium, the coordinator's keys, bundles and request, and every site's folder, under ``root``.

    ``request``: ``"primary"`` (the 2×2 table and the flow) or ``"full"`` (every analysis; see the module
    docstring). The full request also packs the full-length instrument's scoring rule as a second bundle
    (``coordinator/compare.bundle``) and points each site at its ``mapping-full.toml``.
    """
    if request not in ("primary", "full"):
        raise ValueError("request must be 'primary' or 'full'")
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
    compare_bytes = None
    specs = None
    if request == "full":
        assert consortium.long_schema_path is not None and consortium.long_scorecard_path is not None
        long_schema = Schema.from_toml(consortium.long_schema_path.read_text(), str(consortium.long_schema_path))
        compare_bytes = pack_model(
            consortium.long_scorecard_path.read_bytes(),
            "scorecard",
            long_schema,
            private_key,
            [float(LONG_THRESHOLD)],
            "tallowmere-full-instrument",
        )
        write_atomic(coordinator / "compare.bundle", compare_bytes)
        specs = full_request_specs(sha256_hex(compare_bytes))
    request_bytes = issue_request(
        store, study_id, bundle_bytes, private_key, analyses=specs, compare_bundle_bytes=compare_bytes
    )
    write_atomic(coordinator / "request.json", request_bytes)
    site_dirs = []
    for site in consortium.sites:
        site_dir = init_site(root / "site-folders" / site.site_id, site.site_id, [public_path])
        mapping = site.full_mapping_path if request == "full" and site.full_mapping_path else site.mapping_path
        set_site_data(site_dir, site.data_path, mapping)
        if request == "full":
            allow_subgroups(site_dir, SUBGROUP_VARIABLES)
        approve_bundle(site_dir, bundle_bytes, "site IT (demo)")  # `site-agent model approve`, after review
        if compare_bytes is not None:
            approve_bundle(site_dir, compare_bytes, "site IT (demo)")
        store.enrol(site.site_id, (site_dir / "site.pub").read_bytes(), str(site_dir / "site.pub"))
        site_dirs.append(site_dir)
    store.close()
    return DemoStudy(root, consortium, store_path, bundle_bytes, request_bytes, tuple(site_dirs), compare_bytes)


def run_offline(study: DemoStudy) -> list[SiteOutcome]:
    """Each site answers from the command-line path; the coordinator ingests the release files."""
    outcomes, files = [], []
    for index, site_dir in enumerate(study.site_dirs):
        site = load_site(site_dir)
        result = run_request(
            site, study.request_bytes, study.bundle_bytes, compare_bundle_bytes=study.compare_bundle_bytes
        )
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
        compare_bundle_bytes=study.compare_bundle_bytes,
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


def run_demo(out: Path, engine: str = "simulation", seed: int = 2026, request: str = "full") -> int:
    """The whole demo; returns 0 when every site released, 3 when some did not (as `federation report`)."""
    started = time.monotonic()
    print(f"Preparing the invented demo consortium in {out} ...", flush=True)
    study = prepare_study(Path(out), seed, request=request)
    print(f"Running study {STUDY_ID} at {len(study.site_dirs)} sites over the {engine} engine ...", flush=True)
    outcomes = ENGINES[engine](study)
    for outcome in outcomes:
        note = f" ({outcome.reason})" if outcome.reason else ""
        print(f"  {outcome.site_id or f'node {outcome.node_id}'}: {outcome.status}{note}")
    store = Store(study.store_path)
    result = analyze(store, STUDY_ID)
    print()
    print(format_summary(result, release_sections(store, STUDY_ID)))
    missing = enrolled_without_release(store, STUDY_ID)
    if missing:
        print(f"no release yet from {len(missing)} enrolled site(s): {', '.join(missing)}")
    export = export_study(store, study.root / "results", STUDY_ID, result)
    store.close()
    print()
    print(f"store:    {study.store_path}")
    print(f"request:  {study.root / 'coordinator' / 'request.json'}")
    print(f"sites:    {study.root / 'site-folders'} (each with its ledger and releases/)")
    from federation.report import write_report  # imported here: matplotlib loads only when a report is drawn

    report_path = study.root / "report.html"
    write_report(study.store_path, report_path, STUDY_ID)
    print(f"report:   {report_path} (open it in any browser; it fetches nothing)")
    print(f"results:  {export.out_dir} (tidy CSV, one row per site and level, NA = withheld; codebook.csv)")
    print(f"finished in {time.monotonic() - started:.1f} s")
    print("Screening is not diagnosis; these figures do not replace clinical judgement, local regulation")
    print("or ethics approval. All data in this demo is invented.")
    released = sum(o.status == "released" for o in outcomes)
    return 0 if released == len(study.site_dirs) and not missing else 3


if __name__ == "__main__":
    sys.exit(run_demo(Path(sys.argv[1] if len(sys.argv) > 1 else "demo-output")))
