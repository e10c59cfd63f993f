"""Sign the coordinator's acknowledgements of stored releases (``federation run --sign KEY``).

The signing key stays with the ``federation run`` process: the ServerApp inside the SuperLink only reads the
signed documents from the store and sends each site its own. ``run`` signs before it submits a round (every
release stored since: online, or ingested from files) and again when the round ends (the releases this
round stored), so a site receives the acknowledgement of a release with the coordinator's next message.
"""

from __future__ import annotations

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol.acknowledgement import Acknowledgement
from federation.store import Store


def sign_acknowledgements(store: Store, private_key: Ed25519PrivateKey) -> int:
    """Sign and keep an acknowledgement for every stored release that has none; return how many."""
    signed = []
    for digest, study_id, request_id, site_id, stored_at in store.unacknowledged():
        document = Acknowledgement(study_id, request_id, site_id, digest, stored_at).signed_bytes(private_key)
        signed.append((digest, site_id, document))
    if signed:
        store.add_acknowledgements(signed)
    return len(signed)
