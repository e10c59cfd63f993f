"""One function per parser that reads bytes written by another party (or by site IT, for local files).

Each target takes arbitrary bytes and calls the real parser. The contract under test: the parser either
accepts the input or raises a :class:`ValidationToolError` (one clear line); any other exception, a hang or
a crash is a finding. The same targets run under hypothesis in ``make test``
(tests/adversarial/test_fuzz_parsers.py) and under atheris in ``make fuzz`` (fuzz/run.py).
"""

from __future__ import annotations

import functools
import json
import tempfile
from collections.abc import Callable
from pathlib import Path

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol import KeyRing, Release, Request, Schema, ValidationToolError, canonical_bytes, key_id
from federation.protocol.bundle import MAGIC, load_bundle
from federation.protocol.keys import sign
from federation.protocol.scoring import Scorecard

SCHEMA_TOML = """
[[features]]
name = "item_01"
type = "int"
min = 0
max = 3

[[features]]
name = "age_months"
type = "float"
min = 0

[[features]]
name = "sex"
type = "category"
categories = ["female", "male"]
"""


@functools.cache
def _key() -> Ed25519PrivateKey:
    return Ed25519PrivateKey.from_private_bytes(bytes(range(32)))  # a fixed key: findings replay exactly


@functools.cache
def _ring() -> KeyRing:
    public = _key().public_key()
    return KeyRing({key_id(public): public})


@functools.cache
def _schema() -> Schema:
    return Schema.from_toml(SCHEMA_TOML, "schema")


@functools.cache
def _folder() -> Path:
    return Path(tempfile.mkdtemp(prefix="msv-fuzz-"))


def request(data: bytes) -> None:
    """A request document as the site reads it (structure only: signature checking comes first in real use)."""
    Request.from_bytes(data, None, "request")


def signed_request(data: bytes) -> None:
    """A request whose signature verifies (the coordinator is the attacker): every field reaches the parser."""
    try:
        doc = json.loads(data)
    except (ValueError, RecursionError):
        return
    if not isinstance(doc, dict):
        return
    doc.pop("signature", None)
    doc["coordinator_key_id"] = key_id(_key().public_key())
    try:
        signed = {**doc, "signature": sign(_key(), canonical_bytes(doc))}
        encoded = json.dumps(signed).encode()
    except (TypeError, ValueError, RecursionError):
        return  # not representable as canonical JSON: the coordinator could not have signed it
    Request.from_bytes(encoded, _ring(), "request")


def release(data: bytes) -> None:
    """A release document as the coordinator reads it (structure; the signature is checked by the store)."""
    parsed = Release.from_bytes(data, "release")
    parsed.body()
    _ = parsed.release_id


def bundle_frame(data: bytes) -> None:
    """A bundle file: the frame and the signature check, which run before any body parsing."""
    load_bundle(data, _ring(), "bundle")


def bundle_body(data: bytes) -> None:
    """A bundle body signed with a pinned key (the coordinator is the attacker): manifest and schema parsing."""
    body = data
    signature = sign(_key(), body).encode()
    load_bundle(b"\n".join([MAGIC, key_id(_key().public_key()).encode(), signature, body]), _ring(), "bundle")


def scorecard(data: bytes) -> None:
    """A scorecard model part, parsed against a small schema, then scoring three records."""
    import numpy as np

    card = Scorecard.from_json(data, _schema())
    scores = card.score(np.array([[0, 12, 0], [3, 240, 1], [1, 0, 0]], dtype=np.float32))
    assert scores.shape == (3,)


def schema(data: bytes) -> None:
    """The input schema (TOML) the coordinator writes."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return
    Schema.from_toml(text, "schema.toml")


def mapping(data: bytes) -> None:
    """A site's mapping file (TOML), checked against the schema."""
    from site_agent.mapping import load_mapping

    path = _folder() / "mapping.toml"
    path.write_bytes(data)
    load_mapping(path, _schema())


@functools.cache
def site_folder() -> Path:
    """A real site folder (keys, pinned coordinator key); the policy target rewrites its site.toml."""
    from federation.protocol import write_keypair
    from site_agent.config import init_site

    _, pub = write_keypair(_folder() / "coordinator", "coordinator")
    folder = init_site(_folder() / "site", "fuzz-site", [pub])
    (folder / "seed.toml").write_bytes((folder / "site.toml").read_bytes())
    return folder


def policy(data: bytes) -> None:
    """A site's site.toml (policy, trust, data), as the agent loads it."""
    from site_agent.config import load_site

    folder = site_folder()
    (folder / "site.toml").write_bytes(data)
    load_site(folder)


TARGETS: dict[str, Callable[[bytes], None]] = {
    "request": request,
    "signed_request": signed_request,
    "release": release,
    "bundle_frame": bundle_frame,
    "bundle_body": bundle_body,
    "scorecard": scorecard,
    "schema": schema,
    "mapping": mapping,
    "policy": policy,
}


def check(target: Callable[[bytes], None], data: bytes) -> None:
    """Run a target; a ValidationToolError is the expected way to refuse, anything else propagates."""
    try:
        target(data)
    except ValidationToolError as exc:
        message = str(exc)
        assert message and "\n" not in message and "Traceback" not in message, message
