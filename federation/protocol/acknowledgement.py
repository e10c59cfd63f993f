"""The coordinator's acknowledgement (coordinator → site): "my store holds this release of yours", signed.

A site hands a release to its local node (ledger ``sent``); only the coordinator can say it arrived. The
coordinator signs one acknowledgement per stored release with the key the site already pins for requests
(``coordinator.key``), and every later message to the site carries them. The site verifies the signature
against its pinned coordinator keys, checks that the acknowledgement names this site and a release its
ledger shows as handed over, and only then writes ``acknowledged`` (with the signed document, so anyone
holding ``coordinator.pub`` can check it again). A forged or altered acknowledgement is not recorded.

Versioned JSON like the request; the signature covers the canonical JSON of every other field::

    {"kind": "acknowledgement", "version": 1, "study_id": ..., "request_id": ..., "site_id": ...,
     "release_sha256": ..., "stored_at": ..., "coordinator_key_id": ..., "signature": ...}
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from .canonical import canonical_bytes
from .documents import _HEX64, _KEY_ID, VERSION, _check_header, _get, _identifier, _signed, _unsigned, parse_json
from .errors import DocumentError
from .keys import KeyRing, key_id

KIND = "acknowledgement"
MAX_ACKNOWLEDGEMENT_BYTES = 4096


@dataclass(frozen=True)
class Acknowledgement:
    study_id: str
    request_id: str
    site_id: str
    release_sha256: str
    stored_at: str
    coordinator_key_id: str = ""
    signature: str = ""

    def body(self) -> dict[str, Any]:
        return {
            "kind": KIND,
            "version": VERSION,
            "study_id": self.study_id,
            "request_id": self.request_id,
            "site_id": self.site_id,
            "release_sha256": self.release_sha256,
            "stored_at": self.stored_at,
            "coordinator_key_id": self.coordinator_key_id,
        }

    def signed_bytes(self, private_key: Ed25519PrivateKey) -> bytes:
        body = {**self.body(), "coordinator_key_id": key_id(private_key.public_key())}
        return json.dumps(_signed(body, private_key), sort_keys=True, separators=(",", ":")).encode()

    @classmethod
    def from_bytes(cls, data: bytes, trusted: KeyRing | None, source: str = KIND) -> Acknowledgement:
        """Parse and validate; when ``trusted`` is given, verify the coordinator's signature first.

        Raises DocumentError (malformed) or SignatureError (a key not pinned here, or a signature that does
        not verify: altered or forged).
        """
        if len(data) > MAX_ACKNOWLEDGEMENT_BYTES:
            raise DocumentError(f"{source}: larger than {MAX_ACKNOWLEDGEMENT_BYTES} bytes")
        doc = parse_json(data, source)
        _check_header(doc, KIND, source)
        signer = _identifier(doc, "coordinator_key_id", source, _KEY_ID)
        signature = _get(doc, "signature", str, source)
        if trusted is not None:
            trusted.verify(signer, canonical_bytes(_unsigned(doc)), signature, source)
        return cls(
            study_id=_identifier(doc, "study_id", source),
            request_id=_identifier(doc, "request_id", source),
            site_id=_identifier(doc, "site_id", source),
            release_sha256=_identifier(doc, "release_sha256", source, _HEX64),
            stored_at=_get(doc, "stored_at", str, source)[:64],
            coordinator_key_id=signer,
            signature=signature,
        )
