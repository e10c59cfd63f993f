"""Flower's deployment engine for real: a TLS SuperLink and authenticated SuperNodes on loopback.

One module-scoped deployment (the invented consortium, 3 sites that allow the app bundle plus 1 that does
not) serves four scenarios in order; each test starts from what the previous ones left and says so.
The reference for "same result" is outside the online path: the offline command-line path
(``simulations.demo.run_offline``) on a second copy of the same invented data.

Every process is started here, found through its environment (:mod:`tests.deploy.harness`), stopped by
PID in teardown, and teardown asserts that none is left and the SuperLink's port is free.
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import ssl
import subprocess
from dataclasses import dataclass, replace
from pathlib import Path

import pytest

from federation.analysis import analyze
from federation.deploy.commands import enrol_node_key
from federation.deploy.nodes import parse_node_key
from federation.deploy.superlink import LinkSettings, registered_nodes
from federation.protocol import (
    canonical_bytes,
    key_id,
    load_private_key,
    load_public_key,
    sha256_hex,
    write_keypair,
)
from federation.protocol.app_bundle import build_app_bundle
from federation.protocol.cli_support import write_atomic
from federation.protocol.keys import sign
from federation.store import Store
from federation.study import issue_request
from simulations.demo import DemoStudy, prepare_study, run_offline
from site_agent import ledger
from site_agent.config import init_site, load_site

from .harness import (
    BIN,
    Fleet,
    children,
    cmdline,
    free_port,
    gone,
    port_is_free,
    port_listening,
    processes_under,
    wait_until,
)

ALLOWING = ("vellacombe-primary", "brackenholt-specialist", "amberlow-referral")
KILLED = "amberlow-referral"  # the site killed mid-round, and again absent when the SuperLink restarts
REFUSING = "skarrow-specialist"  # enrolled and online, but its allowlist lacks the bundle
COLD = "brackenholt-specialist"  # joined with --cold-start: its ClientApps are new processes, not warm copies
PER_RUN_FIELDS = {"study_id", "request_id", "bundle_sha256", "created_at", "site_key_id", "signature"}
PER_RUN_POLICY_FIELDS = {"trusted_coordinator_keys", "policy_sha256"}
TASK_POLL = "0.2"  # the app runners' task polling; Flower's default is 1 s


@dataclass
class Deployment:
    root: Path
    study: DemoStudy
    coordinator: Path
    sites: dict[str, Path]
    reference: DemoStudy
    fleet: Fleet
    port: int
    fab_sha256: str

    @property
    def key(self) -> Path:
        return self.coordinator / "coordinator.key"

    @property
    def ca(self) -> Path:
        return self.coordinator / "certs" / "ca.crt"

    def start_superlink(self) -> None:
        argv = [str(BIN / "federation"), "serve", "--study-dir", str(self.coordinator), "--port", str(self.port)]
        process = self.fleet.start("superlink", [*argv, "--task-poll", TASK_POLL])
        wait_until(lambda: port_listening(self.port) or process.poll() is not None, 60, "the SuperLink's port")
        assert process.poll() is None, self.fleet.log("superlink")

    def join(self, site: str, *extra: str) -> subprocess.Popen[bytes]:
        argv = [
            str(BIN / "site-agent"),
            "join",
            "--superlink",
            f"127.0.0.1:{self.port}",
            "--site-dir",
            str(self.sites[site]),
        ]
        return self.fleet.start(
            f"join-{site}", [*argv, "--root-certificates", str(self.ca), "--task-poll", TASK_POLL, *extra]
        )

    def online(self) -> set[str]:
        """Sites whose node the SuperLink lists as online (matched by node key, as the ServerApp does)."""
        nodes = registered_nodes(LinkSettings(f"127.0.0.1:{self.port}", self.ca))
        online = set()
        for site, folder in self.sites.items():
            key = parse_node_key((folder / "node.pub").read_bytes(), site)
            if nodes.get(key.fingerprint, (0, ""))[1] == "online":
                online.add(site)
        return online

    def federation_run(self, *args: str, timeout_s: float = 240) -> tuple[int, dict]:
        argv = [str(BIN / "federation"), "run", "--study-dir", str(self.coordinator), "--json", *args]
        result = self.fleet.run(argv, timeout_s)
        assert result.stdout.strip(), result.stderr
        return result.returncode, json.loads(result.stdout)

    def enrol(self, site: str, folder: Path) -> subprocess.CompletedProcess[str]:
        """`federation enrol --node-key`: binds the node key and, with the SuperLink up, registers it."""
        argv = [str(BIN / "federation"), "enrol", "--store", str(self.coordinator / "study.db"), "--site-id", site]
        result = self.fleet.run([*argv, "--key", str(folder / "site.pub"), "--node-key", str(folder / "node.pub")], 60)
        assert result.returncode == 0, result.stderr
        return result

    def new_request(self, study_id: str) -> bytes:
        """Issue a new request (what `federation request new --out STUDY/request.json` does)."""
        store = Store(self.coordinator / "study.db")
        try:
            bundle = (self.coordinator / "model.bundle").read_bytes()
            key = load_private_key(self.coordinator / "coordinator.key")
            document = issue_request(store, study_id, bundle, key)
        finally:
            store.close()
        write_atomic(self.coordinator / "request.json", document)
        return document


def _allow(site_dir: Path, digest: str) -> None:
    config = site_dir / "site.toml"
    config.write_text(config.read_text().replace("allowed_fab_sha256 = []", f'allowed_fab_sha256 = ["{digest}"]'))


@pytest.fixture(scope="module")
def deployment(tmp_path_factory: pytest.TempPathFactory):  # noqa: ANN201
    root = tmp_path_factory.mktemp("deploy")
    study = prepare_study(root / "online")
    reference = prepare_study(root / "offline")
    coordinator = study.root / "coordinator"
    fleet = Fleet(root)
    sites = {d.name: d for d in study.site_dirs if d.name in (*ALLOWING, REFUSING)}
    digest = build_app_bundle().sha256
    for name in ALLOWING:
        _allow(sites[name], digest)
    made = fleet.run([str(BIN / "federation"), "certs", "new", "--out-dir", str(coordinator / "certs")], 60)
    assert made.returncode == 0, made.stderr
    deployment = Deployment(root, study, coordinator, sites, reference, fleet, free_port(), digest)
    try:
        deployment.start_superlink()
        deployment.enrol(REFUSING, sites[REFUSING])  # the command line once; the same function for the rest
        store = Store(coordinator / "study.db")
        try:
            for name in ALLOWING:
                enrol_node_key(store, name, sites[name] / "node.pub")
        finally:
            store.close()
        for name in sites:  # one site starts each ClientApp cold (a new process), the others warm (a fork)
            deployment.join(name, *(["--cold-start"] if name == COLD else []))
        yield deployment
    finally:
        fleet.stop_all()
        leftovers = wait_until_gone(root)
        assert not leftovers, "processes left running: " + "; ".join(cmdline(p) for p in leftovers)
        assert port_is_free(deployment.port), f"port {deployment.port} still in use"
        for port in runtime_ports(deployment.sites.values()):  # each SuperNode's local Runtime API
            assert port_is_free(port), f"runtime port {port} still in use"


def runtime_ports(site_dirs) -> set[int]:  # noqa: ANN001
    ports = set()
    for folder in site_dirs:
        log = folder / "runtime" / "supernode.log"
        if log.exists():
            ports |= {int(p) for p in re.findall(r"Uvicorn running on http://127\.0\.0\.1:(\d+)", log.read_text())}
    return ports


def wait_until_gone(root: Path, timeout_s: float = 20.0) -> list[int]:
    try:
        wait_until(lambda: not processes_under(root), timeout_s, "Flower processes to exit")
    except AssertionError:
        pids = processes_under(root)
        for pid in pids:  # kill by PID so the next module starts clean, then report them
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        return pids
    return []


def _comparable(document: bytes) -> dict:
    """A release without what differs between two runs of the same data (ids, times, keys, signatures)."""
    release = {k: v for k, v in json.loads(document).items() if k not in PER_RUN_FIELDS}
    if isinstance(release.get("policy"), dict):  # the two studies pin different (random) coordinator keys
        release["policy"] = {k: v for k, v in release["policy"].items() if k not in PER_RUN_POLICY_FIELDS}
    return release


def _releases(store_path: Path, study_id: str) -> dict[str, bytes]:
    store = Store(store_path)
    try:
        return {r.release.site_id: r.document for r in store.releases(study_id)}
    finally:
        store.close()


def _after_setup(entries: list[dict]) -> list[dict]:
    """A site's ledger entries after its set-up: the demo study's sites approve both models first."""
    setup = 0
    while setup < len(entries) and entries[setup]["event"] == "model_approval":
        setup += 1
    assert setup >= 1, "the demo study's sites approve their models before any round"
    return entries[setup:]


def _round_entries(site_dir: Path, request_bytes: bytes) -> list[str]:
    """The ledger events a site wrote for one request (request_received carries the request's SHA-256)."""
    digest = sha256_hex(request_bytes)
    events = []
    for entry in ledger.read_entries(site_dir / "ledger.jsonl"):
        details = entry.get("details", {})
        if details.get("request_sha256") == digest or (
            entry["event"] == "release" and details.get("request_id") == json.loads(request_bytes)["request_id"]
        ):
            events.append(entry["event"])
    return events


@pytest.fixture(scope="module")
def offline_reference(deployment: Deployment) -> tuple[dict[str, bytes], dict]:
    """The offline path on the same three sites' data: the numbers the online round must reproduce."""
    subset = tuple(d for d in deployment.reference.site_dirs if d.name in ALLOWING)
    run_offline(replace(deployment.reference, site_dirs=subset))
    study_id = json.loads(deployment.reference.request_bytes)["study_id"]
    store = Store(deployment.reference.store_path)
    try:
        analysis = analyze(store, study_id)
    finally:
        store.close()
    return _releases(deployment.reference.store_path, study_id), analysis


@pytest.fixture(scope="module")
def first_round(deployment: Deployment) -> tuple[int, dict]:
    wait_until(lambda: deployment.online() == set(deployment.sites), 90, "all four SuperNodes online")
    # --sign: when the round ends, `run` signs an acknowledgement of each release it stored (the next message
    # to each site carries it).
    return deployment.federation_run("--min-sites", "3", "--deadline", "90", "--sign", str(deployment.key))


def test_superlink_runs_with_tls_node_auth_and_no_dependency_installs(deployment: Deployment) -> None:
    pid = deployment.fleet.procs["superlink"].pid
    argv = cmdline(pid)  # `federation serve` replaced itself with the SuperLink (Flower's, in our process)
    assert "-m federation.deploy.link_process --study" in argv
    for flag in ("--enable-supernode-auth", "--disable-runtime-dependency-installation", "--ssl-ca-certfile"):
        assert flag in argv
    assert f"--database {deployment.coordinator.resolve() / 'superlink' / 'state.db'}" in argv
    assert "--host 127.0.0.1" in argv  # loopback unless the coordinator chooses otherwise
    environ = Path(f"/proc/{pid}/environ").read_bytes().split(b"\0")
    assert b"FLWR_TELEMETRY_ENABLED=0" in environ and b"FLWR_DISABLE_UPDATE_CHECK=1" in environ
    # TLS, checked with Python's ssl module: our CA verifies the server; the system trust store does not.
    trusted = ssl.create_default_context(cafile=str(deployment.ca))
    with socket.create_connection(("127.0.0.1", deployment.port), timeout=5) as raw:
        with trusted.wrap_socket(raw, server_hostname="127.0.0.1") as tls:
            assert tls.version() in ("TLSv1.2", "TLSv1.3")
    with socket.create_connection(("127.0.0.1", deployment.port), timeout=5) as raw:
        with pytest.raises(ssl.SSLCertVerificationError):
            ssl.create_default_context().wrap_socket(raw, server_hostname="127.0.0.1")


def test_round_matches_offline_path(deployment: Deployment, first_round: tuple[int, dict], offline_reference) -> None:
    code, outcome = first_round
    assert outcome["state"] == "complete"
    assert {s: outcome["sites"][s]["status"] for s in ALLOWING} == dict.fromkeys(ALLOWING, "released")
    assert code == 3  # quorum reached, but not every site released (the refusing one)
    reference_releases, reference_analysis = offline_reference
    study_id = json.loads(deployment.study.request_bytes)["study_id"]
    online = _releases(deployment.coordinator / "study.db", study_id)
    assert set(online) == set(ALLOWING) == set(reference_releases)
    for site in ALLOWING:
        assert _comparable(online[site]) == _comparable(reference_releases[site]), site
    store = Store(deployment.coordinator / "study.db")
    try:
        analysis = analyze(store, study_id)
    finally:
        store.close()
    assert analysis["sites"] == reference_analysis["sites"]
    assert analysis["pooled"] == reference_analysis["pooled"]
    assert len(analysis["sites"]) == 3
    # Warm sites answered from copies of their warm process; the cold site started no warm process.
    for site, folder in deployment.sites.items():
        log = folder / "runtime" / "warm-start.log"
        if site == COLD:
            assert not log.exists()
        else:
            assert "ClientApp copy started" in log.read_text(), site
    # Three sites are too few for the bivariate headline model; it says so, and the univariate sensitivity
    # analysis pools what it can.
    assert analysis["pooled"]["sensitivity"] is None
    assert "at least 4" in analysis["pooled"]["not_estimable"]["sensitivity"]
    assert analysis["pooled"]["sensitivity_analyses"]["univariate"]["sensitivity"] is not None


def test_site_refuses_bundle_missing_from_its_allowlist(deployment: Deployment, first_round: tuple[int, dict]) -> None:
    _, outcome = first_round
    refusal = outcome["sites"][REFUSING]
    assert refusal["status"] == "refused"
    assert f"app bundle sha256 {deployment.fab_sha256} is not in this site's allowlist" in refusal["reason"]
    site = load_site(deployment.sites[REFUSING])
    entries = _after_setup(ledger.read_entries(site.ledger_path))
    assert [e["event"] for e in entries][:1] == ["refusal"]
    assert entries[0]["details"]["app_bundle_sha256"] == deployment.fab_sha256
    assert ledger.verify_ledger(site.ledger_path, site.public_key()) == len(ledger.read_entries(site.ledger_path))
    assert not list(site.releases_dir.iterdir())
    # Nothing of the bundle was installed at the refusing site.
    assert not list((deployment.sites[REFUSING] / "runtime" / "flwr-home").glob("apps/*"))


def test_readiness_check_fails_the_refusing_site_and_delivers_only_signed_acknowledgements(
    deployment: Deployment, first_round: tuple[int, dict], tmp_path: Path
) -> None:
    # One site's acknowledgement is forged in the coordinator's store before the check: the same fields,
    # signed by another key that claims the coordinator's key id (what a party between the store and the site
    # could send). The site must refuse it and keep its release as sent only.
    forged_site, claimed = ALLOWING[1], key_id(load_public_key(deployment.coordinator / "coordinator.pub"))
    rogue = load_private_key(write_keypair(tmp_path / "rogue", "rogue")[0])
    store = Store(deployment.coordinator / "study.db")
    try:
        (document,) = store.acknowledgements_of(forged_site)
        body = {k: v for k, v in json.loads(document).items() if k != "signature"}
        assert body["coordinator_key_id"] == claimed and body["site_id"] == forged_site
        forged = json.dumps({**body, "signature": sign(rogue, canonical_bytes(body))}).encode()
        store._db.execute("UPDATE acknowledgements SET document = ? WHERE site_id = ?", (forged, forged_site))
    finally:
        store.close()
    code, outcome = deployment.federation_run("--ping", "--deadline", "90")  # no --sign: nothing new is signed
    assert outcome["kind"] == "readiness" and outcome["state"] == "complete"
    assert code == 3  # complete, but one site is not ready
    assert outcome["released"] == 0 and outcome["ready"] == len(ALLOWING)
    statuses = {site: info["status"] for site, info in outcome["sites"].items()}
    assert statuses == {**dict.fromkeys(ALLOWING, "ready"), REFUSING: "failed"}
    # The launcher's refusal is an error reply: a failure with its category, never "answered".
    assert outcome["sites"][REFUSING]["reason"].startswith(f"app allowlist: site {REFUSING}: app bundle sha256 ")
    assert "ledger, app allowlist, data source" in outcome["sites"][ALLOWING[0]]["reason"]
    store = Store(deployment.coordinator / "study.db")
    try:
        kinds = [r["kind"] for r in store.rounds(json.loads(deployment.study.request_bytes)["request_id"])]
        stored = {site: store.stored_releases_of(site) for site in ALLOWING}
    finally:
        store.close()
    assert kinds == ["validate", "readiness"]  # stored as a readiness check, not as a release round
    for site in ALLOWING:  # the first round's releases, acknowledged in the ledger on this next message
        entries = _after_setup(ledger.read_entries(deployment.sites[site] / "ledger.jsonl"))
        events = [e["event"] for e in entries]
        assert entries[2]["details"]["note"].startswith("handed to the local node")
        if site == forged_site:  # refused: not recorded as delivered, and the site's app runner log says why
            assert events == ["request_received", "release", "sent"], site
            log = (deployment.sites[site] / "runtime" / "app-runner.log").read_text()
            assert (
                "acknowledgements: refused, not recorded as delivered: acknowledgement 1: signature does not verify "
                "(altered or forged)"
            ) in log
            continue
        assert events == ["request_received", "release", "sent", "acknowledged"], site
        ack = entries[3]["details"]
        assert [(ack["release_sha256"], ack["stored_at"])] == stored[site]
        assert ack["coordinator_key_id"] == claimed
        assert json.loads(ack["acknowledgement"])["site_id"] == site  # the signed document, kept as it arrived
    refusals = _after_setup(ledger.read_entries(deployment.sites[REFUSING] / "ledger.jsonl"))
    assert [e["event"] for e in refusals] == ["refusal", "refusal"]  # the launcher refused the check's bundle too


def test_runtime_port_is_loopback_only_and_refuses_calls_without_the_runtime_secret(
    deployment: Deployment, first_round: tuple[int, dict]
) -> None:
    import httpx
    from flwr.proto.runtime_pb2 import AcquireTaskRequest
    from flwr.supercore.runtime.runtime_http_client import RuntimeHttpClient

    folder = deployment.sites[ALLOWING[0]]
    secret = folder / "runtime" / "runtime.secret"
    assert secret.stat().st_mode & 0o777 == 0o600 and (folder / "runtime").stat().st_mode & 0o777 == 0o700
    port = max(runtime_ports([folder]))  # the live node's port (the log holds every start's)
    listening = [line.split() for line in Path("/proc/net/tcp").read_text().splitlines()[1:]]
    local = {entry[1] for entry in listening if entry[3] == "0A"}  # state 0A: LISTEN
    assert f"0100007F:{port:04X}" in local  # 127.0.0.1 only
    assert f"00000000:{port:04X}" not in local  # not every interface
    # Another local process without the site's runtime secret cannot take the node's tasks (Flower's own client).
    client = RuntimeHttpClient(f"http://127.0.0.1:{port}")
    with pytest.raises(httpx.HTTPStatusError) as refused:
        client.AcquireTask(AcquireTaskRequest(supported_task_types=["clientapp"]))
    assert refused.value.response.status_code in (401, 403)


def test_a_site_whose_warm_process_dies_says_so_and_answers_cold(deployment: Deployment, first_round) -> None:
    site = "vellacombe-primary"  # a warm site that stays online for the tests after this one
    join_pid = deployment.fleet.procs[f"join-{site}"].pid
    log = deployment.sites[site] / "runtime" / "warm-start.log"
    copies = log.read_text().count("ClientApp copy started")

    def warm_process() -> int | None:
        found = [p for p in children(join_pid) if "site_agent.warmstart serve" in cmdline(p)]
        assert len(found) <= 1
        return found[0] if found else None

    restarted = "the warm process exited (status -9); starting it again"
    cold = "the warm process exited (status -9) within a minute of starting; ClientApps start cold"
    first = warm_process()
    assert first is not None
    os.kill(first, signal.SIGKILL)
    # How long the first warm process has lived depends on how fast the machine ran the tests before this one:
    # past a minute, join starts it again (once); that second one, killed at once, is the one that leaves it cold.
    said = wait_until(
        lambda: next((m for m in (restarted, cold) if m in deployment.fleet.log(f"join-{site}")), None),
        30,
        "join to say the warm process is gone",
    )
    if said == restarted:
        second = wait_until(lambda: warm_process() not in (None, first) and warm_process(), 30, "a new warm process")
        os.kill(int(second), signal.SIGKILL)
        wait_until(lambda: cold in deployment.fleet.log(f"join-{site}"), 30, "join to leave ClientApps cold")
        assert deployment.fleet.log(f"join-{site}").count(restarted) == 1
    code, outcome = deployment.federation_run("--ping", "--deadline", "90")
    assert outcome["sites"][site]["status"] == "ready"  # answered by a cold start
    assert log.read_text().count("ClientApp copy started") == copies
    assert warm_process() is None  # not restarted


def test_site_killed_mid_round_is_unreachable_and_round_completes(deployment: Deployment, first_round) -> None:
    fleet, site_dir = deployment.fleet, deployment.sites[KILLED]
    request = deployment.new_request("tallowmere-online-2")
    argv = [str(BIN / "federation"), "run", "--study-dir", str(deployment.coordinator), "--json"]
    running = subprocess.Popen(
        [*argv, "--min-sites", "2", "--deadline", "45"], stdout=subprocess.PIPE, env=fleet.env, text=True
    )
    try:
        join_pid = fleet.procs[f"join-{KILLED}"].pid

        def clientapp() -> int | None:
            for pid in processes_under(site_dir):
                line = cmdline(pid)  # a warm client (the copy it hands over to is a fork) or a cold launcher
                if f"--site-dir {site_dir.resolve()}" in line and ("warmstart client" in line or "clientapp" in line):
                    return pid
            return None

        app_pid = int(wait_until(clientapp, 60, "the killed site's ClientApp to start", step_s=0.02))
        supernode = next(p for p in children(join_pid) if "flower-supernode" in cmdline(p))
        runner = next(p for p in children(join_pid) if "flower-superexec" in cmdline(p))
        for pid in (join_pid, supernode):  # the site's supervisor and node die at once, as in a crash
            os.kill(pid, signal.SIGKILL)
        fleet.procs.pop(f"join-{KILLED}").wait(timeout=10)
        # The app runner and the ClientApp it was running do not outlive their node.
        wait_until(lambda: gone(runner) and gone(app_pid), 15, "the app runner and ClientApp to exit")
        # Nor does anything else of the site: the warm process and the copy that was answering the round.
        wait_until(lambda: not processes_under(site_dir), 15, "every process of the killed site to exit")
        stdout, _ = running.communicate(timeout=120)
    finally:
        if running.poll() is None:
            running.kill()
            running.wait()
    outcome = json.loads(stdout)
    assert running.returncode == 3
    assert outcome["state"] == "complete"
    statuses = {site: info["status"] for site, info in outcome["sites"].items()}
    assert statuses == {
        "vellacombe-primary": "released",
        "brackenholt-specialist": "released",
        KILLED: "unreachable",
        REFUSING: "refused",
    }
    # Which of the two a killed site gets depends on whether the SuperLink declared its node unavailable (after
    # missed heartbeats, FLOWER-NOTES) before the deadline; both say the request went out and nothing came back.
    assert outcome["sites"][KILLED]["reason"] in ("no reply before the deadline", "still unreachable at the deadline")
    assert outcome["sites"][KILLED]["attempts"] == 1
    assert set(_releases(deployment.coordinator / "study.db", "tallowmere-online-2")) == {
        "vellacombe-primary",
        "brackenholt-specialist",
    }
    assert "release" not in _round_entries(site_dir, request)


def test_superlink_restart_then_resume_loses_and_duplicates_nothing(deployment: Deployment, offline_reference) -> None:
    fleet = deployment.fleet
    fleet.stop(f"join-{KILLED}")  # absent when the round starts (already so if the previous test ran)
    request = deployment.new_request("tallowmere-online-3")
    request_id = json.loads(request)["request_id"]
    argv = [str(BIN / "federation"), "run", "--study-dir", str(deployment.coordinator), "--json"]
    first = subprocess.Popen(
        [*argv, "--min-sites", "3", "--deadline", "120"], stdout=subprocess.PIPE, env=fleet.env, text=True
    )
    try:

        def two_released() -> bool:
            released = set(_releases(deployment.coordinator / "study.db", "tallowmere-online-3"))
            return released == {"vellacombe-primary", "brackenholt-specialist"}

        wait_until(two_released, 90, "two releases before the restart", step_s=0.2)
        fleet.stop("superlink", signal.SIGKILL)  # the SuperLink crashes mid-round, waiting for the third site
        stdout, _ = first.communicate(timeout=60)  # the command ends on its own
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()
    interrupted = json.loads(stdout) if stdout.strip() else {}
    assert first.returncode == 4, interrupted
    assert interrupted["state"] == "interrupted"
    assert interrupted["sites"][KILLED]["status"] == "unreachable"
    # The ServerApp and the SuperLink's app runner went down with it.
    wait_until(
        lambda: not processes_under(deployment.coordinator.resolve() / "superlink"), 20, "the SuperLink's children"
    )

    deployment.start_superlink()  # same state database: node registrations survive
    # Resume first, then let the absent site back in: `--resume` stops the dead round's run at the SuperLink
    # before it submits a new one, so the returning site is asked by the new round only.
    resume = subprocess.Popen(
        [*argv, "--resume", "--min-sites", "3", "--deadline", "90"], stdout=subprocess.PIPE, env=fleet.env, text=True
    )
    try:

        def resumed_round_live() -> bool:
            store = Store(deployment.coordinator / "study.db")
            try:
                rounds = store.rounds(request_id)
            finally:
                store.close()
            return len(rounds) == 2 and rounds[-1]["state"] in ("waiting", "running")

        wait_until(resumed_round_live, 60, "the resumed round to start", step_s=0.2)
        deployment.join(KILLED)
        stdout, _ = resume.communicate(timeout=150)
    finally:
        if resume.poll() is None:
            resume.kill()
            resume.wait()
    resumed = json.loads(stdout)
    assert resumed["state"] == "complete", resumed
    assert resume.returncode == 3  # the refusing site still refuses
    assert resumed["released_before"] == 2
    assert set(resumed["sites"]) == {KILLED, REFUSING}  # sites that had released were not asked again
    assert resumed["sites"][KILLED]["status"] == "released"

    online = _releases(deployment.coordinator / "study.db", "tallowmere-online-3")
    assert set(online) == set(ALLOWING)  # nothing lost
    store = Store(deployment.coordinator / "study.db")
    try:
        assert store.answered(request_id) == set(ALLOWING)
        assert sum(1 for _ in store.releases("tallowmere-online-3")) == 3  # nothing duplicated
    finally:
        store.close()
    for site in ALLOWING:  # each site was asked once and released once for this request
        assert _round_entries(deployment.sites[site], request) == ["request_received", "release"], site
    reference_releases, _ = offline_reference
    for site in ALLOWING:
        assert _comparable(online[site]) == _comparable(reference_releases[site]), site


def test_unregistered_node_key_is_refused_and_supervisor_restarts_after_305(deployment: Deployment) -> None:
    fleet = deployment.fleet
    newcomer = init_site(deployment.root / "newcomer", "newcomer-clinic", [deployment.coordinator / "coordinator.pub"])
    deployment.sites["newcomer-clinic"] = newcomer
    joined = deployment.join("newcomer-clinic", "--max-restarts", "0")
    assert joined.wait(timeout=60) == 4  # could not stay online (EXIT_OFFLINE)
    fleet.procs.pop("join-newcomer-clinic")
    assert "Exit Code: 305" in (newcomer / "runtime" / "supernode.log").read_text()
    said = fleet.log("join-newcomer-clinic")
    fingerprint = parse_node_key((newcomer / "node.pub").read_bytes(), "node.pub").fingerprint
    assert f"the SuperLink does not accept this node key (node key sha256 {fingerprint[:16]}): not registered" in said
    assert "no restarts left" in said
    assert "newcomer-clinic" not in deployment.online()

    # The same site, supervised without a restart limit, gets in once the coordinator registers its key.
    deployment.join("newcomer-clinic")
    wait_until(lambda: "retry 1 in" in fleet.log("join-newcomer-clinic"), 60, "the supervisor to see exit 305")
    enrolled = deployment.enrol("newcomer-clinic", newcomer)
    assert "registered with the SuperLink as node" in enrolled.stdout
    wait_until(lambda: "newcomer-clinic" in deployment.online(), 60, "the newcomer's node online")
    assert fleet.procs["join-newcomer-clinic"].poll() is None
    wait_until(lambda: "connected to the SuperLink as node" in fleet.log("join-newcomer-clinic"), 30, "the join line")
    # Neither the site's terminal nor the SuperLink's log holds the node's full public key.
    pem_body = parse_node_key((newcomer / "node.pub").read_bytes(), "node.pub").pem.decode().splitlines()[1]
    assert pem_body not in fleet.log("join-newcomer-clinic")
    assert pem_body not in fleet.log("superlink")
    assert fingerprint[:16] in fleet.log("superlink")  # the refused attempts, named by fingerprint


@pytest.mark.parametrize("trust", ["another-ca", "none"])
def test_join_stops_on_certificate_failures_and_says_why_in_one_line(deployment: Deployment, trust: str) -> None:
    folder = deployment.root / f"tls-{trust}"  # a site folder of its own: never enrolled, fails before that matters
    init_site(folder, f"tls-{trust}", [deployment.coordinator / "coordinator.pub"])
    other = deployment.root / "other-ca"
    if not (other / "ca.crt").exists():
        made = deployment.fleet.run([str(BIN / "federation"), "certs", "new", "--out", str(other)], 60)
        assert made.returncode == 0, made.stderr
    argv = [str(BIN / "site-agent"), "join", "--superlink", f"127.0.0.1:{deployment.port}"]
    argv += ["--site", str(folder), "--runtime-port", str(free_port())]
    if trust == "another-ca":
        argv += ["--root-certificates", str(other / "ca.crt")]
    name = f"join-{trust}"
    joined = deployment.fleet.start(name, argv)
    assert joined.wait(timeout=90) == 2  # stopped, not retried: retrying cannot fix a certificate
    deployment.fleet.procs.pop(name)
    lines = [line for line in deployment.fleet.log(name).splitlines() if "TLS:" in line]
    assert len(lines) == 1 and lines[0].endswith("; not retrying (fix this, then join again)")
    if trust == "another-ca":
        assert f"not signed by the CA in {other / 'ca.crt'} (a certificate from another CA)" in lines[0]
    else:
        assert "no root certificate was given" in lines[0] and "--root-certificates" in lines[0]
    assert "SuperNode started" in deployment.fleet.log(name) and "retry 1 in" not in deployment.fleet.log(name)


def test_superlink_start_registers_node_keys_enrolled_while_it_was_down(deployment: Deployment) -> None:
    fleet = deployment.fleet
    fleet.stop("superlink")
    late = init_site(deployment.root / "late", "late-clinic", [deployment.coordinator / "coordinator.pub"])
    enrolled = deployment.enrol("late-clinic", late)  # enrolled first: the SuperLink is not running
    assert "not registered yet" in enrolled.stdout
    fingerprint = parse_node_key((late / "node.pub").read_bytes(), "node.pub").fingerprint
    deployment.start_superlink()
    link = LinkSettings(f"127.0.0.1:{deployment.port}", deployment.ca)
    wait_until(lambda: fingerprint in registered_nodes(link), 60, "the SuperLink to register the enrolled key")
    assert f"registered the node key of site late-clinic (sha256 {fingerprint[:16]})" in fleet.log("superlink")
    deployment.sites["late-clinic"] = late
    deployment.join("late-clinic")  # no `federation run` in between: the site gets in at once
    wait_until(lambda: "late-clinic" in deployment.online(), 60, "the late site's node online")
    assert "retry" not in fleet.log("join-late-clinic")
