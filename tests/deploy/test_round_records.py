"""What an online round records, driven in-process: the real ServerApp round, ClientApp, store and ledgers.

Only the transport is replaced (:class:`simulations.inprocess.LoopbackGrid`, Flower's own Message types and
ClientApp routing); the SuperLink, SuperNodes and the launcher's error replies are exercised with real
processes in ``test_deployment.py``. The reference for "ready" is outside the round: each site folder is
also checked by the offline command path (``site-agent check``-style ``load_site`` + file system).
"""

from __future__ import annotations

import json
import re
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest
from flwr.app import Context, RecordDict

from federation.deploy.acknowledge import sign_acknowledgements
from federation.deploy.nodes import parse_node_key
from federation.deploy.rounds import RoundSettings, run_deployed_round
from federation.protocol import KeyRing, canonical_bytes, key_id, load_private_key, load_public_key, write_keypair
from federation.protocol.acknowledgement import Acknowledgement
from federation.protocol.keys import sign
from federation.store import Store
from simulations.demo import DemoStudy, prepare_study
from simulations.inprocess import SERVER_NODE_ID, LoopbackGrid, _identity
from site_agent import ledger
from site_agent.config import load_site
from site_agent.flower_client import make_client_app
from site_agent.readiness import CHECKS, check_readiness, shareable

SITES = 3


@dataclass(frozen=True)
class _NodeInfo:  # what Grid.get_nodes() reports and the round reads: node id and PEM public key
    node_id: int
    public_key: bytes


class KeyedGrid(LoopbackGrid):
    """The loopback grid, with each node reporting the node key of the site folder it serves."""

    def __init__(self, site_dirs: list[Path], online: set[int] | None = None) -> None:
        super().__init__(make_client_app(), [{"site-dir": str(d)} for d in site_dirs])
        self._keys = {i + 1: parse_node_key((d / "node.pub").read_bytes(), d.name).pem for i, d in enumerate(site_dirs)}
        self._up = set(self._keys) if online is None else online

    def get_nodes(self) -> list[_NodeInfo]:
        return [_NodeInfo(n, self._keys[n]) for n in sorted(self._up)]


@pytest.fixture
def study(tmp_path: Path) -> DemoStudy:
    study = prepare_study(tmp_path / "study")
    store = Store(study.store_path)
    try:
        for folder in study.site_dirs[:SITES]:
            key = parse_node_key((folder / "node.pub").read_bytes(), "node.pub")
            store.bind_node_key(folder.name, key.fingerprint, key.pem, "node.pub")
    finally:
        store.close()
    return study


def _sign(study: DemoStudy) -> int:
    store = Store(study.store_path)
    try:
        return sign_acknowledgements(store, load_private_key(study.root / "coordinator" / "coordinator.key"))
    finally:
        store.close()


def _round(study: DemoStudy, kind: str, grid: KeyedGrid, min_sites: int = SITES, deadline_s: float = 20.0) -> dict:
    round_id = uuid.uuid4().hex
    store = Store(study.store_path)
    request_id = json.loads(study.request_bytes)["request_id"]
    stored_kind = "readiness" if kind == "ping" else kind
    store.start_round(round_id, request_id, stored_kind, min_sites, deadline_s)
    store.close()
    settings = RoundSettings(study.store_path.parent, round_id, kind, min_sites, deadline_s, poll_s=0.05)
    context = Context(run_id=1, node_id=SERVER_NODE_ID, node_config={}, state=RecordDict(), run_config={})
    del context  # the round reads only its settings
    with _identity(1, SERVER_NODE_ID, 1):
        run_deployed_round(grid, settings)
    store = Store(study.store_path)
    try:
        return store.round_sites(round_id)
    finally:
        store.close()


def _entries(folder: Path) -> list[dict]:
    """The site's ledger after its set-up: the demo study's sites approve both models first (model approval)."""
    entries = ledger.read_entries(folder / "ledger.jsonl")
    setup = 0
    while setup < len(entries) and entries[setup]["event"] == "model_approval":
        setup += 1
    assert setup >= 1, "the demo study's sites approve their models before any round"
    return entries[setup:]


def _events(folder: Path) -> list[str]:
    return [e["event"] for e in _entries(folder)]


def test_readiness_check_names_the_failed_category_and_releases_nothing(study: DemoStudy) -> None:
    folders = list(study.site_dirs[:SITES])
    broken = folders[2]
    config = broken / "site.toml"
    data_line = re.search(r"^path = \"(.*?)\"", config.read_text(), re.M)
    assert data_line is not None
    missing = Path(data_line.group(1)).with_name("moved-away.csv")
    config.write_text(config.read_text().replace(data_line.group(1), str(missing)))

    sites = _round(study, "ping", KeyedGrid(folders))
    assert {s: sites[s]["status"] for s in sites} == {
        folders[0].name: "ready",
        folders[1].name: "ready",
        broken.name: "failed",
    }
    assert sites[folders[0].name]["reason"] == "checked: " + ", ".join(CHECKS)
    assert sites[broken.name]["reason"] == "data source: [a path at the site]: data file not found"
    assert str(missing.parent) not in json.dumps(sites)  # no path of the site's file system reached the store
    store = Store(study.store_path)
    try:
        assert store.releases(json.loads(study.request_bytes)["study_id"]) == []  # a readiness check releases nothing
        rounds = store.rounds(json.loads(study.request_bytes)["request_id"])
    finally:
        store.close()
    assert [r["kind"] for r in rounds] == ["readiness"]
    assert rounds[0]["state"] == "complete" and rounds[0]["note"] == "2 ready of 3 bound sites"
    for folder in folders:  # nothing was read, computed or recorded at the sites
        assert _events(folder) == []


def test_readiness_categories_follow_the_checks_in_order(study: DemoStudy, tmp_path: Path) -> None:
    folder = study.site_dirs[0]
    assert check_readiness(folder, None).status == "ready"
    assert check_readiness(tmp_path / "nowhere", None).category == "site folder"
    listed = check_readiness(folder, "ab" * 32)  # a launcher-checked hash the site does not list
    assert (listed.category, listed.passed) == ("app allowlist", ["site folder", "policy", "keys", "ledger"])
    (folder / "ledger.jsonl").write_bytes(b'{"seq": 1')  # a ledger cut off mid-entry
    cut = check_readiness(folder, None)
    assert cut.category == "ledger" and "SITEDIR/ledger.jsonl: the last entry is incomplete" in cut.reason
    (folder / "ledger.jsonl").write_bytes(b"")
    (folder / "site.pub").write_bytes((study.site_dirs[1] / "site.pub").read_bytes())  # another site's key
    assert check_readiness(folder, None).category == "keys"


def test_shareable_reasons_hold_no_paths() -> None:
    site = Path("/srv/sites/north")
    assert shareable("/srv/sites/north/site.toml: not valid TOML", site) == "SITEDIR/site.toml: not valid TOML"
    assert shareable("/data/exports/cohort-2024.csv: data file not found", site) == (
        "[a path at the site]: data file not found"
    )
    assert shareable("sqlite:////var/db/records.db: cannot connect", site) == "[a path at the site]: cannot connect"
    assert shareable("3/4 sites and/or a ratio", site) == "3/4 sites and/or a ratio"


def test_release_is_sent_then_acknowledged_on_the_next_message(study: DemoStudy) -> None:
    folders = list(study.site_dirs[:SITES])
    sites = _round(study, "validate", KeyedGrid(folders))
    assert {s["status"] for s in sites.values()} == {"released"}
    for folder in folders:
        entries = _entries(folder)
        assert [e["event"] for e in entries] == ["request_received", "release", "sent"]
        assert entries[-1]["details"]["via"] == "flower"
        assert entries[-1]["details"]["note"].startswith("handed to the local node (SuperNode) for delivery")

    _round(study, "ping", KeyedGrid(folders))  # nothing signed yet: an unsigned store holds no acknowledgement
    assert all(_events(folder)[-1] == "sent" for folder in folders)

    assert _sign(study) == SITES  # what `federation run --sign` does before and after a round
    _round(study, "ping", KeyedGrid(folders))  # the next message carries the coordinator's acknowledgements
    store = Store(study.store_path)
    try:
        stored = {folder.name: store.stored_releases_of(folder.name) for folder in folders}
    finally:
        store.close()
    coordinator = load_public_key(study.root / "coordinator" / "coordinator.pub")
    for folder in folders:
        entries = _entries(folder)
        assert [e["event"] for e in entries] == ["request_received", "release", "sent", "acknowledged"]
        ((digest, stored_at),) = stored[folder.name]
        ack = entries[-1]["details"]
        assert ack["release_sha256"] == digest == entries[1]["details"]["release_sha256"]
        assert ack["stored_at"] == stored_at and ack["request_id"] == json.loads(study.request_bytes)["request_id"]
        assert ack["coordinator_key_id"] == key_id(coordinator)
        # The signed document is kept: anyone with coordinator.pub checks it again.
        ring = KeyRing({key_id(coordinator): coordinator})
        document = Acknowledgement.from_bytes(ack["acknowledgement"].encode(), ring)
        assert (document.site_id, document.release_sha256) == (folder.name, digest)
        site = load_site(folder)
        assert ledger.verify_ledger(site.ledger_path, site.public_key()) == len(ledger.read_entries(site.ledger_path))

    _round(study, "ping", KeyedGrid(folders))  # acknowledged once: the same acknowledgement again adds nothing
    assert all(_events(folder).count("acknowledged") == 1 for folder in folders)


def test_acknowledgement_of_a_release_the_site_never_sent_is_ignored(study: DemoStudy) -> None:
    folders = list(study.site_dirs[:SITES])
    _round(study, "validate", KeyedGrid(folders[:1]), min_sites=1, deadline_s=5)
    store = Store(study.store_path)
    try:  # the coordinator's store claims a release from site 2 that site 2 never made
        digest, _ = store.stored_releases_of(folders[0].name)[0]
        store._db.execute("UPDATE releases SET site_id = ? WHERE release_sha256 = ?", (folders[1].name, digest))
        store._db.commit()
    finally:
        store.close()
    assert _sign(study) == 1  # signed by the real coordinator key, but naming a release site 2 never handed over
    _round(study, "ping", KeyedGrid(folders))
    assert "acknowledged" not in _events(folders[1])


def _forge(study: DemoStudy, site_id: str, change: Callable[[bytes], bytes]) -> None:
    store = Store(study.store_path)
    try:
        (document,) = store.acknowledgements_of(site_id)
        store._db.execute("UPDATE acknowledgements SET document = ? WHERE site_id = ?", (change(document), site_id))
        store._db.commit()
    finally:
        store.close()


def test_forged_or_altered_acknowledgements_are_refused_and_not_recorded(
    study: DemoStudy, tmp_path: Path, capfd: pytest.CaptureFixture[str]
) -> None:
    folders = list(study.site_dirs[:SITES])
    _round(study, "validate", KeyedGrid(folders))
    assert _sign(study) == SITES
    # Site 1: an acknowledgement signed by another key that claims the coordinator's key id (a forgery).
    rogue_key = load_private_key(write_keypair(tmp_path / "rogue", "rogue")[0])
    claimed = key_id(load_public_key(study.root / "coordinator" / "coordinator.pub"))

    def forged(document: bytes) -> bytes:
        body = {k: v for k, v in json.loads(document).items() if k != "signature"}
        assert body["coordinator_key_id"] == claimed  # the forgery names the pinned key; its signature is not by it
        return json.dumps({**body, "signature": sign(rogue_key, canonical_bytes(body))}).encode()

    _forge(study, folders[0].name, forged)
    # Site 2: the real signature, with the storage time altered after signing.
    _forge(study, folders[1].name, lambda d: d.replace(b'"stored_at":"', b'"stored_at":"1999-'))
    capfd.readouterr()
    _round(study, "ping", KeyedGrid(folders))
    log = capfd.readouterr().err
    assert _events(folders[0])[-1] == "sent" and _events(folders[1])[-1] == "sent"  # not recorded as delivered
    assert _events(folders[2])[-1] == "acknowledged"  # the untouched acknowledgement is recorded
    assert (
        log.count(
            "acknowledgements: refused, not recorded as delivered: acknowledgement 1: signature does not "
            "verify (altered or forged)"
        )
        == 2
    )


def test_sites_connected_but_never_asked_are_not_called_unconnected(study: DemoStudy) -> None:
    folders = list(study.site_dirs[:SITES])
    # Two of three nodes online, a quorum of three: nobody is asked before the deadline.
    sites = _round(study, "validate", KeyedGrid(folders, online={1, 2}), min_sites=3, deadline_s=1.0)
    assert sites[folders[0].name]["status"] == "not asked"
    assert sites[folders[0].name]["reason"] == "connected, but the round ended before it was asked"
    assert sites[folders[2].name] == {
        **sites[folders[2].name],
        "status": "unreachable",
        "reason": "did not connect before the deadline",
    }
    assert all(_events(folder) == [] for folder in folders)


def test_refusal_sent_to_the_coordinator_holds_no_site_path(study: DemoStudy) -> None:
    folders = list(study.site_dirs[:SITES])
    config = folders[0] / "site.toml"
    data_line = re.search(r"^path = \"(.*?)\"", config.read_text(), re.M)
    assert data_line is not None
    config.write_text(config.read_text().replace(data_line.group(1), data_line.group(1) + ".gone"))
    sites = _round(study, "validate", KeyedGrid(folders))
    refused = sites[folders[0].name]
    assert refused["status"] == "refused"
    assert refused["reason"] == "data could not be read"  # a fixed category (docs/formats.md, "Refusals")
    assert "/" not in refused["reason"]
    # The site's own ledger keeps the full message, path included, for its IT staff.
    refusal = ledger.read_entries(folders[0] / "ledger.jsonl")[-1]
    assert refusal["event"] == "refusal" and refusal["details"]["detail"].startswith(data_line.group(1))


def test_reply_content_still_in_flight_is_asked_for_again_within_a_second() -> None:
    """Flower's own object pull (not a stand-in) as the ServerApp's grid calls it, after quicker_reply_pulls."""
    import time
    from functools import partial

    from flwr.supercore.inflatable.inflatable_utils import ObjectUnavailableError
    from flwr.superlink.grid import http_grid

    from federation.deploy.rounds import REPLY_PULL_BACKOFF, quicker_reply_pulls

    saved = http_grid.pull_objects  # the rounds above, run in this process, may have wrapped it already
    original = saved.func if isinstance(saved, partial) else saved
    http_grid.pull_objects = original
    try:
        quicker_reply_pulls()
        quicker_reply_pulls()  # once only: a second call does not stack another wrapper
        assert isinstance(http_grid.pull_objects, partial) and http_grid.pull_objects.func is original
        tries: list[float] = []

        def pull_one(object_id: str) -> bytes:  # the content arrives on the third ask
            tries.append(time.monotonic())
            if len(tries) < 3:
                raise ObjectUnavailableError(object_id)
            return b"content"

        started = time.monotonic()
        assert http_grid.pull_objects(["reply"], pull_one) == {"reply": b"content"}
        # Waits of about 0.1 s and 0.2 s (each +-20% jitter, Flower's), where Flower's defaults wait 1 s and 2 s.
        first, _ = REPLY_PULL_BACKOFF
        assert len(tries) == 3
        assert 0.8 * first <= tries[1] - tries[0] < 1.0
        assert time.monotonic() - started < 1.0
    finally:
        http_grid.pull_objects = saved
