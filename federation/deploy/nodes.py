"""Node keys: the EC keys sites' SuperNodes authenticate with, in the forms Flower and the store use.

A site's ``node.pub`` is an OpenSSH public key (what ``ssh-keygen -t ecdsa`` and ``site-agent init`` write);
the SuperLink reports node keys as PEM SubjectPublicKeyInfo. Both are reduced to one fingerprint, the
SHA-256 of the DER SubjectPublicKeyInfo, so a node the SuperLink lists can be matched to the site the store
bound it to.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

from cryptography.exceptions import UnsupportedAlgorithm
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec

from federation.protocol import ValidationToolError

NIST_CURVES = (ec.SECP256R1, ec.SECP384R1, ec.SECP521R1)


@dataclass(frozen=True)
class NodeKey:
    fingerprint: str  # SHA-256 (hex) of the DER SubjectPublicKeyInfo
    pem: bytes  # PEM SubjectPublicKeyInfo, the form Flower registers and reports


def parse_node_key(data: bytes, source: str) -> NodeKey:
    """Read an EC public key given as OpenSSH (``node.pub``) or PEM; refuse anything Flower would refuse."""
    text = data.strip()
    try:
        if text.startswith(b"-----BEGIN"):
            key = serialization.load_pem_public_key(text)
        else:
            key = serialization.load_ssh_public_key(text)
    except (ValueError, UnsupportedAlgorithm):
        raise ValidationToolError(f"{source}: not an OpenSSH or PEM public key (use the site's node.pub)") from None
    if not isinstance(key, ec.EllipticCurvePublicKey) or not isinstance(key.curve, NIST_CURVES):
        raise ValidationToolError(f"{source}: a node key must be an EC key on a NIST curve (P-256, P-384 or P-521)")
    der = key.public_bytes(serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo)
    pem = key.public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)
    return NodeKey(hashlib.sha256(der).hexdigest(), pem)


def fingerprint_of_reported(pem: bytes) -> str | None:
    """Fingerprint of a key as the SuperLink reports it, or None if it is not a node key we can read."""
    try:
        return parse_node_key(pem, "node key").fingerprint
    except ValidationToolError:
        return None
