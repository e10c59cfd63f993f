"""A faulty or hostile site: it holds its own enrolled signing key, so whatever it sends is validly signed.
The coordinator's store must refuse releases that contradict themselves, answer another study or bundle,
repeat an earlier answer, come too late, or are far too large."""

from __future__ import annotations

import json
import re
import shutil
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from flwr.app import ConfigRecord, Context, Message, RecordDict
from flwr.clientapp import ClientApp

from federation.flower_server import make_server_app
from federation.protocol import DocumentError, IngestError, Release, canonical_bytes, write_keypair
from federation.protocol.keys import load_private_key, sign
from federation.store import Store
from simulations.demo import round_config
from simulations.inprocess import SERVER_NODE_ID, LoopbackGrid, _identity
from site_agent import ledger
from site_agent.config import Site, load_site
from site_agent.flower_client import make_client_app
from site_agent.runner import run_request

from .conftest import SITE, Coordinator, store_copy


@pytest.fixture
def answered(coordinator: Coordinator, tmp_path: Path) -> tuple[Site, Path, bytes]:
    """A copy of an enrolled demo site that answered the demo request, and a copy of the coordinator store."""
    folder = Path(shutil.copytree(coordinator.demo.site_dirs[SITE], tmp_path / "site"))
    site = load_site(folder)
    store = store_copy(coordinator, tmp_path / "coordinator")
    release = run_request(site, coordinator.demo.request_bytes, coordinator.demo.bundle_bytes).release_bytes
    return site, store, release


def resigned(release: bytes, site: Site, change: Any) -> bytes:
    """The release edited by ``change(doc)`` and signed again with the site's own enrolled key."""
    doc = json.loads(release)
    change(doc)
    doc.pop("signature")
    doc["signature"] = sign(site.private_key(), canonical_bytes(doc))
    return json.dumps(doc).encode()


def ingest_error(store_path: Path, data: bytes) -> str:
    store = Store(store_path)
    try:
        with pytest.raises((IngestError, DocumentError)) as refused:
            store.ingest([(data, "release.json")])
        assert store.releases("tallowmere-validation-1") == []  # nothing half-written
    finally:
        store.close()
    return str(refused.value)


def test_the_genuine_release_is_accepted(answered) -> None:  # noqa: ANN001
    site, store_path, release = answered
    store = Store(store_path)
    assert [r.site_id for r in store.ingest([(release, "release.json")])] == [site.site_id]
    store.close()


def _set(path: str, value: Any):  # noqa: ANN202
    def change(doc: dict) -> None:
        *parents, last = path.split(".")
        node = doc
        for part in parents:
            node = node[int(part)] if part.isdigit() else node[part]
        node[last] = value

    return change


def _add(path: str, amount: int):  # noqa: ANN202
    def change(doc: dict) -> None:
        *parents, last = path.split(".")
        node = doc
        for part in parents:
            node = node[int(part)] if part.isdigit() else node[part]
        node[last] += amount

    return change


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (_add("results.confusion.0.cells.tp", 1), r"results.confusion\[0\]: tp \+ fn is not flow.analysed_positive"),
        (_add("results.confusion.0.cells.tn", -1), r"results.confusion\[0\]: fp \+ tn is not flow.analysed_negative"),
        (_add("flow.analysed_positive", 1), "flow.analysed is not analysed_positive"),
        (_add("flow.read", -100), "flow.read does not match analysed"),
        (_add("flow.excluded.missing_feature", 100), "flow.read does not match analysed"),
        (_set("results.confusion.0.cells.fp", -5), "a count must be a non-negative integer or null"),
        (_set("results.confusion.0.cells.fp", 12.5), "a count must be a non-negative integer or null"),
        (_set("results.confusion.0.cells.fp", "90"), "a count must be a non-negative integer or null"),
        (_set("results.confusion.0.cells.fp", True), "a count must be a non-negative integer or null"),
        (_set("flow.analysed", -1), "a count must be a non-negative integer or null"),
        (_set("flow.excluded", {"missing_feature": 2.5}), "a count must be a non-negative integer or null"),
        (_set("results.roc", {"bands": []}), "results.roc was not asked for"),
        (_set("results.exfiltrated", [1, 2, 3]), "results.exfiltrated was not asked for"),
        (_set("results.confusion", "everything"), "results.confusion: wrong type"),
        (_set("study_id", "another-study"), "study id does not match request"),
        (_set("bundle_sha256", "0" * 64), "bundle hash does not match"),
        (_set("request_id", "never-issued"), "which this store did not issue"),
        (_set("site_id", "quillbrook-community"), "not the key enrolled for site 'quillbrook-community'"),
    ],
)
def test_a_release_that_contradicts_itself_or_its_request_is_refused(answered, change, message: str) -> None:  # noqa: ANN001
    site, store_path, release = answered
    bad = resigned(release, site, change)
    assert Release.from_bytes(release).signature != json.loads(bad)["signature"]
    assert re.search(message, ingest_error(store_path, bad))


def test_a_release_signed_by_a_key_not_enrolled_is_refused(answered, tmp_path: Path) -> None:  # noqa: ANN001
    site, store_path, release = answered
    key, _ = write_keypair(tmp_path / "impostor", "site")
    doc = json.loads(release)
    doc.pop("signature")
    doc["signature"] = sign(load_private_key(key), canonical_bytes(doc))
    assert "not the key enrolled for site" in ingest_error(store_path, json.dumps(doc).encode())


def test_a_replay_and_a_second_answer_are_refused(answered, coordinator: Coordinator, tmp_path: Path) -> None:  # noqa: ANN001
    site, store_path, release = answered
    store = Store(store_path)
    store.ingest([(release, "release.json")])
    with pytest.raises(IngestError, match="this release is already ingested"):
        store.ingest([(release, "again.json")])
    second = resigned(release, site, _set("created_at", "2030-01-01T00:00:00+00:00"))
    with pytest.raises(IngestError, match="a replay or second answer is refused"):
        store.ingest([(second, "second.json")])
    with pytest.raises(IngestError, match="answers the same request twice in this batch"):
        Store(store_copy(coordinator, tmp_path / "fresh")).ingest([(release, "a.json"), (release, "b.json")])
    assert len(store.releases("tallowmere-validation-1")) == 1
    store.close()


def test_a_100_mb_answer_is_refused_without_parsing(answered) -> None:  # noqa: ANN001
    _, store_path, _ = answered
    huge = b'{"kind": "release", "pad": "' + b"x" * (100 * 1024 * 1024) + b'"}'
    start = time.perf_counter()
    assert "larger than 8 MiB" in ingest_error(store_path, huge)
    assert time.perf_counter() - start < 2.0


def test_a_100_mb_answer_over_flower_is_rejected_and_recorded(coordinator: Coordinator, tmp_path: Path) -> None:
    """A hostile ClientApp answers with 100 MB; the real ServerApp records the site as rejected."""
    hostile = ClientApp()

    @hostile.query("validate")
    def flood(message: Message, context: Context) -> Message:
        fields = {"status": "released", "release": b"{" + b" " * (100 * 1024 * 1024) + b"}", "site_id": "x"}
        return Message(RecordDict({"result": ConfigRecord(fields)}), reply_to=message)

    store_path = store_copy(coordinator, tmp_path / "coordinator")
    config = replace(
        round_config(coordinator.demo), store_path=store_path, min_sites=1, wait_for_sites_s=1.0, deadline_s=10.0
    )
    outcomes: list = []
    grid = LoopbackGrid(hostile, [{"site-dir": "unused"}])
    context = Context(run_id=1, node_id=SERVER_NODE_ID, node_config={}, state=RecordDict(), run_config={})
    with _identity(1, SERVER_NODE_ID, 1):
        make_server_app(config, outcomes.extend)(grid, context)
    assert [o.status for o in outcomes] == ["rejected"]
    assert "larger than 8 MiB" in outcomes[0].reason
    store = Store(store_path)
    assert store.releases("tallowmere-validation-1") == []
    store.close()


class LateGrid(LoopbackGrid):
    """Replies reach the coordinator only ``delay_s`` after they were sent (a slow or late site)."""

    def __init__(self, *args: Any, delay_s: float, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._ready_at = time.monotonic() + delay_s

    def pull_messages(self, message_ids):  # noqa: ANN001, ANN201
        return super().pull_messages(message_ids) if time.monotonic() >= self._ready_at else []


def test_a_site_answering_after_the_deadline_is_not_ingested_and_can_hand_the_same_release_over_later(
    coordinator: Coordinator, tmp_path: Path
) -> None:
    folder = Path(shutil.copytree(coordinator.demo.site_dirs[SITE], tmp_path / "site"))
    store_path = store_copy(coordinator, tmp_path / "coordinator")
    config = replace(
        round_config(coordinator.demo),
        store_path=store_path,
        min_sites=1,
        wait_for_sites_s=1.0,
        deadline_s=1.0,
        poll_s=0.05,
    )
    outcomes: list = []
    grid = LateGrid(make_client_app(), [{"site-dir": str(folder)}], delay_s=2.0)
    context = Context(run_id=1, node_id=SERVER_NODE_ID, node_config={}, state=RecordDict(), run_config={})
    with _identity(1, SERVER_NODE_ID, 1):
        make_server_app(config, outcomes.extend)(grid, context)
    assert [(o.status, o.reason) for o in outcomes] == [("unreachable", "no reply before the deadline")]
    store = Store(store_path)
    assert store.releases("tallowmere-validation-1") == []
    site = load_site(folder)
    events = [e["event"] for e in ledger.read_entries(site.ledger_path)]
    assert events == ["model_approval", "request_received", "release", "sent"]  # the site did answer, late
    # The coordinator asks again (the same request): the site hands over the recorded release, computes nothing.
    again = run_request(site, coordinator.demo.request_bytes, coordinator.demo.bundle_bytes)
    recorded = ledger.releases_for_study(site.ledger_path, "tallowmere-validation-1")
    assert len(recorded) == 1 and again.release_bytes.decode() == recorded[0]["release"]
    store.ingest([(again.release_bytes, "late release")])
    assert len(store.releases("tallowmere-validation-1")) == 1
    store.close()
