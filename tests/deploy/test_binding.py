"""Who may speak for a site online, and what a site agrees to run, checked without Flower's servers.

Real components throughout: a real SQLite store, real site folders and signed releases from the site
agent's own offline path, the real launcher check. The servers themselves are exercised in
``test_deployment.py``.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest

from federation.deploy.certs import new_certificates
from federation.deploy.fab import build_app_bundle
from federation.deploy.nodes import parse_node_key
from federation.deploy.rounds import check_release_binding, clientapp_reason
from federation.deploy.runs import RunOptions, run_study
from federation.deploy.superlink import LinkSettings
from federation.protocol import DocumentError, IngestError, ValidationToolError
from federation.store import Store
from simulations.demo import DemoStudy, prepare_study
from site_agent import ledger
from site_agent.config import load_site
from site_agent.launcher import AppBundleRefused, check_app_bundle
from site_agent.runner import run_request
from site_agent.supernode import flower_exit_code

from .harness import BIN, free_port


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> DemoStudy:
    return prepare_study(tmp_path_factory.mktemp("binding") / "study")


def _site(study: DemoStudy, name: str) -> Path:
    return next(d for d in study.site_dirs if d.name == name)


def test_node_key_from_site_init_reads_as_flower_reports_it(study: DemoStudy) -> None:
    site = _site(study, "vellacombe-primary")
    from_openssh = parse_node_key((site / "node.pub").read_bytes(), "node.pub")
    again = parse_node_key(from_openssh.pem, "pem")  # the SuperLink reports PEM SubjectPublicKeyInfo
    assert again.fingerprint == from_openssh.fingerprint
    assert (site / "node.key").stat().st_mode & 0o777 == 0o600
    with pytest.raises(ValidationToolError, match="EC key on a NIST curve"):
        parse_node_key((site / "site.pub").read_bytes(), "site.pub")  # the Ed25519 release key is not one


def test_store_binds_one_node_key_per_site(study: DemoStudy, tmp_path: Path) -> None:
    store = Store(tmp_path / "study.db")
    a, b = _site(study, "vellacombe-primary"), _site(study, "brackenholt-specialist")
    for folder in (a, b):
        store.enrol(folder.name, (folder / "site.pub").read_bytes(), "site.pub")
    key_a = parse_node_key((a / "node.pub").read_bytes(), "a")
    key_b = parse_node_key((b / "node.pub").read_bytes(), "b")
    store.bind_node_key(a.name, key_a.fingerprint, key_a.pem, "a/node.pub")
    store.bind_node_key(a.name, key_a.fingerprint, key_a.pem, "a/node.pub")  # the same binding again is fine
    with pytest.raises(IngestError, match="already bound to site 'vellacombe-primary'"):
        store.bind_node_key(b.name, key_a.fingerprint, key_a.pem, "a/node.pub")
    with pytest.raises(IngestError, match="already bound to another node key"):
        store.bind_node_key(a.name, key_b.fingerprint, key_b.pem, "b/node.pub")
    with pytest.raises(IngestError, match="not enrolled"):
        store.bind_node_key("nowhere-clinic", key_b.fingerprint, key_b.pem, "b/node.pub")
    assert store.node_keys() == {a.name: (key_a.fingerprint, key_a.pem)}
    store.close()


def test_release_from_a_node_claiming_another_site_is_refused(study: DemoStudy) -> None:
    site = load_site(_site(study, "brackenholt-specialist"))
    release = run_request(site, study.request_bytes, study.bundle_bytes).release_bytes
    assert check_release_binding(release, "brackenholt-specialist", 7) is None
    problem = check_release_binding(release, "vellacombe-primary", 7)
    assert problem == (
        "node 7 is bound to site 'vellacombe-primary' but its release claims site 'brackenholt-specialist'"
    )


def test_launcher_runs_only_listed_bundles_and_records_refusals(study: DemoStudy) -> None:
    folder = _site(study, "amberlow-referral")
    bundle = build_app_bundle()
    with pytest.raises(AppBundleRefused, match=f"app bundle sha256 {bundle.sha256} is not in this site's allowlist"):
        check_app_bundle(folder, bundle.content)
    site = load_site(folder)
    last = ledger.read_entries(site.ledger_path)[-1]
    assert last["event"] == "refusal" and last["details"]["app_bundle_sha256"] == bundle.sha256
    config = folder / "site.toml"
    listed = f'allowed_fab_sha256 = ["{bundle.sha256}"]'
    config.write_text(config.read_text().replace("allowed_fab_sha256 = []", listed))
    assert check_app_bundle(folder, bundle.content) == bundle.sha256
    with pytest.raises(AppBundleRefused):
        check_app_bundle(folder, bundle.content + b"\0")  # one byte more is another bundle
    config.write_text(config.read_text().replace(f'["{bundle.sha256}"]', '["not-a-hash"]'))
    with pytest.raises(DocumentError, match=r"\[app\].allowed_fab_sha256: must list SHA-256 hashes"):
        load_site(folder)
    config.write_text(config.read_text().replace('["not-a-hash"]', "[]"))


def test_flower_reasons_are_unwrapped_and_exit_codes_read() -> None:
    assert clientapp_reason("<class 'site_agent.launcher.AppBundleRefused'>:<'site x: refused'>") == "site x: refused"
    assert clientapp_reason("plain reason") == "plain reason"
    log = "INFO starting\nERROR Exit Code: 305\nFailed to initialize the connection\n"
    assert flower_exit_code(log) == 305 and flower_exit_code("no code here") is None


def _federation(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN / "federation"), *args], capture_output=True, text=True, timeout=60, check=False)


def test_run_command_errors_are_one_line(study: DemoStudy, tmp_path: Path) -> None:
    coordinator = study.root / "coordinator"
    with pytest.raises(ValidationToolError, match=r"superlink.toml: not found \(start the SuperLink with `federation"):
        run_study(RunOptions(study=tmp_path))
    certs = new_certificates(coordinator / "certs")
    LinkSettings(f"127.0.0.1:{free_port()}", certs.ca_certificate).write(coordinator)
    with pytest.raises(ValidationToolError, match=r"no site has a node key \(enrol sites with --node-key\)"):
        run_study(RunOptions(study=coordinator))
    store = Store(coordinator / "study.db")
    folder = _site(study, "tarrowby-primary")
    key = parse_node_key((folder / "node.pub").read_bytes(), "node.pub")
    store.bind_node_key(folder.name, key.fingerprint, key.pem, "node.pub")
    store.close()
    with pytest.raises(ValidationToolError, match="--min-sites: must be from 1 to 1"):
        run_study(RunOptions(study=coordinator, min_sites=2))
    # Through the command line: one line on stderr and the error's exit code.
    down = _federation("run", "--study-dir", str(coordinator))  # nothing listens on that port
    assert down.returncode == 4 and down.stderr.count("\n") == 1
    assert "did not answer" in down.stderr and "is `federation serve` running?" in down.stderr
    serve = _federation("serve", "--study-dir", str(coordinator), "--certs-dir", str(tmp_path / "no-certs"))
    assert serve.returncode == 1 and serve.stderr.count("\n") == 1
    assert "ca.crt: not found (make the files with `federation certs new" in serve.stderr
