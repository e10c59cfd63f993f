"""The model bundle: one signed file holding the manifest, the input schema and the frozen model.

Layout (bytes)::

    MSV-BUNDLE/1\n
    <signer key id>\n
    <base64 Ed25519 signature of the body>\n
    <body: canonical JSON>

The body holds the manifest (schema, score meaning, thresholds, positive label, model format) and the
model part in base64 with its SHA-256. The signature is verified against pinned keys *before* the body is
parsed, so nothing from an unverified file reaches a parser beyond the three header lines. No archive, no
pickle: a bundle is data.
"""

from __future__ import annotations

import base64
import binascii
import json
import math
import re
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from .canonical import canonical_bytes, sha256_hex
from .errors import BundleError, BundleSignatureError, DocumentError, SignatureError
from .keys import KeyRing, key_id, sign
from .schema import Schema

MAGIC = b"MSV-BUNDLE/1"
MAX_BUNDLE_BYTES = 64 * 1024 * 1024
MODEL_FORMATS = ("onnx", "scorecard")
SCORE_KINDS = ("probability", "points")
_KEY_ID = re.compile(r"^[0-9a-f]{16}$")


@dataclass(frozen=True)
class Manifest:
    name: str
    schema: Schema
    model_format: str
    score_kind: str
    thresholds: tuple[float, ...]
    positive_label: str
    model_sha256: str
    created_at: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "created_at": self.created_at,
            "schema": self.schema.to_dict(),
            "score": {
                "kind": self.score_kind,
                "thresholds": list(self.thresholds),
                "positive_label": self.positive_label,
                "rule": "screen-positive when score >= threshold",
            },
            "model": {"format": self.model_format, "sha256": self.model_sha256},
        }


@dataclass(frozen=True)
class Bundle:
    """A verified bundle. ``sha256`` is the hash of the whole file, which requests and releases name."""

    manifest: Manifest
    model_bytes: bytes
    sha256: str
    signer_key_id: str

    @property
    def schema(self) -> Schema:
        return self.manifest.schema

    @property
    def threshold(self) -> float:
        return self.manifest.thresholds[0]


def pack_bundle(
    *,
    model_bytes: bytes,
    model_format: str,
    schema: Schema,
    score_kind: str,
    thresholds: list[float],
    private_key: Ed25519PrivateKey,
    name: str = "model",
    positive_label: str = "condition present",
    created_at: str | None = None,
) -> bytes:
    """Build and sign a bundle; returns the file's bytes."""
    if model_format not in MODEL_FORMATS:
        raise BundleError(f"model format must be one of {', '.join(MODEL_FORMATS)}")
    if score_kind not in SCORE_KINDS:
        raise BundleError(f"score kind must be one of {', '.join(SCORE_KINDS)}")
    if not thresholds or not all(math.isfinite(t) for t in thresholds):
        raise BundleError("at least one finite threshold is needed")
    if score_kind == "probability" and not all(0.0 < t < 1.0 for t in thresholds):
        raise BundleError("a probability threshold must lie strictly between 0 and 1")
    manifest = Manifest(
        name=name,
        schema=schema,
        model_format=model_format,
        score_kind=score_kind,
        thresholds=tuple(float(t) for t in thresholds),
        positive_label=positive_label,
        model_sha256=sha256_hex(model_bytes),
        created_at=created_at or datetime.now(UTC).replace(microsecond=0).isoformat(),
    )
    body = canonical_bytes(
        {
            "format": "MSV-BUNDLE",
            "version": 1,
            "manifest": manifest.to_dict(),
            "model_b64": base64.b64encode(model_bytes).decode("ascii"),
        }
    )
    public_id = key_id(private_key.public_key())
    return b"\n".join([MAGIC, public_id.encode("ascii"), sign(private_key, body).encode("ascii"), body])


def split_bundle(data: bytes, source: str) -> tuple[str, str, bytes]:
    """Return (signer key id, signature, body) after checking only the frame."""
    if len(data) > MAX_BUNDLE_BYTES:
        raise BundleError(f"{source}: larger than {MAX_BUNDLE_BYTES // (1024 * 1024)} MiB")
    parts = data.split(b"\n", 3)
    if len(parts) != 4 or parts[0] != MAGIC:
        raise BundleError(f"{source}: not a model bundle (expected the line {MAGIC.decode()})")
    try:
        signer, signature = parts[1].decode("ascii"), parts[2].decode("ascii")
    except UnicodeDecodeError:
        raise BundleError(f"{source}: bundle header is not ASCII") from None
    if not _KEY_ID.match(signer):
        raise BundleError(f"{source}: signer key id is malformed")
    return signer, signature, parts[3]


def load_bundle(data: bytes, trusted: KeyRing, source: str = "bundle") -> Bundle:
    """Verify the signature against ``trusted`` keys, then parse and check every part."""
    signer, signature, body = split_bundle(data, source)
    try:
        trusted.verify(signer, body, signature, source)
    except SignatureError as exc:
        raise BundleSignatureError(str(exc)) from None
    return _parse_body(body, source, signer, sha256_hex(data))


def read_bundle_file(path: Path, trusted: KeyRing) -> Bundle:
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise BundleError(f"{path}: bundle file not found") from None
    return load_bundle(data, trusted, str(path))


def _parse_body(body: bytes, source: str, signer: str, file_sha256: str) -> Bundle:
    try:
        doc = json.loads(body)
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise BundleError(f"{source}: bundle body is not JSON") from None
    if not isinstance(doc, dict) or doc.get("format") != "MSV-BUNDLE" or doc.get("version") != 1:
        raise BundleError(f"{source}: unsupported bundle format or version")
    raw = doc.get("manifest")
    if not isinstance(raw, dict):
        raise BundleError(f"{source}: manifest missing")
    try:
        schema = Schema.from_dict(raw.get("schema"), f"{source}: manifest.schema")
    except DocumentError as exc:
        raise BundleError(str(exc)) from None
    score, model = raw.get("score"), raw.get("model")
    if not isinstance(score, dict) or not isinstance(model, dict):
        raise BundleError(f"{source}: manifest needs score and model tables")
    thresholds = score.get("thresholds")
    if (
        not isinstance(thresholds, list)
        or not thresholds
        or not all(isinstance(t, (int, float)) and not isinstance(t, bool) for t in thresholds)
    ):
        raise BundleError(f"{source}: manifest.score.thresholds must be a list of numbers")
    if score.get("kind") not in SCORE_KINDS or model.get("format") not in MODEL_FORMATS:
        raise BundleError(f"{source}: unsupported score kind or model format")
    try:
        model_bytes = base64.b64decode(doc.get("model_b64", ""), validate=True)
    except (binascii.Error, TypeError, ValueError):
        raise BundleError(f"{source}: model part is not base64") from None
    if sha256_hex(model_bytes) != model.get("sha256"):
        raise BundleError(f"{source}: model part does not match its SHA-256 in the manifest")
    manifest = Manifest(
        name=str(raw.get("name", "model")),
        schema=schema,
        model_format=model["format"],
        score_kind=score["kind"],
        thresholds=tuple(float(t) for t in thresholds),
        positive_label=str(score.get("positive_label", "condition present")),
        model_sha256=model["sha256"],
        created_at=str(raw.get("created_at", "")),
    )
    return Bundle(manifest, model_bytes, file_sha256, signer)
