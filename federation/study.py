"""Issuing a study request: sign it, record it in the store, return the document."""

from __future__ import annotations

import json
import uuid
from datetime import UTC, datetime

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol import AnalysisSpec, KeyRing, Request, key_id, load_bundle

from .store import Store


def issue_request(
    store: Store,
    study_id: str,
    bundle_bytes: bytes,
    private_key: Ed25519PrivateKey,
    thresholds: tuple[float, ...] = (),
    request_id: str | None = None,
) -> bytes:
    """Sign a request for ``bundle_bytes`` and record the request (and the bundle) in ``store``."""
    public = private_key.public_key()
    ring = KeyRing({key_id(public): public})
    bundle = load_bundle(bundle_bytes, ring, "bundle")
    request = Request(
        study_id=study_id,
        request_id=request_id or uuid.uuid4().hex,
        bundle_sha256=bundle.sha256,
        analyses=(AnalysisSpec("confusion", thresholds),),
        issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
    )
    document = request.signed_bytes(private_key)
    parsed = Request.from_bytes(document, ring, "request")  # validates ids and the signature we just made
    store.add_bundle(bundle.sha256, bundle.manifest.name, json.dumps(bundle.manifest.to_dict()))
    store.add_request(parsed, document)
    return document
