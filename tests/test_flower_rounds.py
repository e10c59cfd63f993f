"""The same site and coordinator code driven through Flower: in-process (no Ray) and the simulation engine.

Reference: the offline path on the same data (itself checked against scikit-learn in test_offline_path).
"""

from __future__ import annotations

import json
import re
from dataclasses import replace
from pathlib import Path

import pytest

from federation.analysis import analyze
from federation.flower_server import make_server_app
from federation.protocol import write_keypair
from federation.store import Store
from simulations.demo import DemoStudy, prepare_study, round_config, run_flower_simulation, run_offline
from simulations.inprocess import run_inprocess
from site_agent.flower_client import make_client_app


def three_site_study(root: Path) -> DemoStudy:
    study = prepare_study(root)
    return replace(study, site_dirs=study.site_dirs[:3])


def tables(store_path: Path) -> dict[str, list]:
    return {s["site_id"]: [s["tp"], s["fp"], s["fn"], s["tn"]] for s in analyze(Store(store_path))["sites"]}


@pytest.fixture(scope="module")
def offline_reference(tmp_path_factory) -> dict[str, list]:
    study = three_site_study(tmp_path_factory.mktemp("offline"))
    run_offline(study)
    return tables(study.store_path)


def test_inprocess_round_matches_offline(tmp_path, offline_reference):
    study = three_site_study(tmp_path / "inprocess")
    outcomes = []
    run_inprocess(make_server_app(round_config(study), outcomes.extend), make_client_app(), study.site_dirs)
    assert sorted(o.status for o in outcomes) == ["released"] * 3
    assert tables(study.store_path) == offline_reference
    for site_dir in study.site_dirs:  # each site recorded what it sent
        events = [json.loads(line)["event"] for line in (site_dir / "ledger.jsonl").read_text().splitlines()]
        assert events == ["model_approval", "request_received", "release", "sent"]


def test_inprocess_round_records_refusals_and_silent_sites(tmp_path):
    study = three_site_study(tmp_path / "mixed")
    # Site 2 pins a different coordinator key, so it must refuse the request; site 3 never answers.
    _, other = write_keypair(tmp_path / "other", "coordinator")
    config = study.site_dirs[1] / "site.toml"
    config.write_text(re.sub(r"coordinator_keys = \[.*\]", f'coordinator_keys = ["{other}"]', config.read_text()))
    outcomes = []
    cfg = replace(round_config(study), deadline_s=3.0)
    run_inprocess(make_server_app(cfg, outcomes.extend), make_client_app(), study.site_dirs, silent=[3])
    by_node = {o.node_id: o for o in outcomes}
    assert by_node[1].status == "released"
    assert by_node[2].status == "refused" and "not pinned here" in by_node[2].reason
    assert by_node[3].status == "unreachable"
    assert set(tables(study.store_path)) == {by_node[1].site_id}


@pytest.mark.slow
def test_simulation_engine_with_three_sites(tmp_path, offline_reference):
    study = three_site_study(tmp_path / "simulation")
    outcomes = run_flower_simulation(study)
    assert sorted(o.status for o in outcomes) == ["released"] * 3
    assert tables(study.store_path) == offline_reference
