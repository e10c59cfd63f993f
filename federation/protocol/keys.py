"""Ed25519 keys: generation, loading, key ids, signing and verification.

Private keys are PKCS#8 PEM files readable by their owner only; public keys are SubjectPublicKeyInfo PEM.
A key id is the first 16 hex digits of the SHA-256 of the raw 32-byte public key.
"""

from __future__ import annotations

import base64
import os
from dataclasses import dataclass
from pathlib import Path

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from .canonical import sha256_hex
from .errors import SignatureError, ValidationToolError


def key_id(public_key: Ed25519PublicKey) -> str:
    raw = public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    return sha256_hex(raw)[:16]


def public_pem(public_key: Ed25519PublicKey) -> bytes:
    return public_key.public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)


def write_keypair(out_dir: Path, stem: str) -> tuple[Path, Path]:
    """Create ``stem.key`` (mode 0600) and ``stem.pub`` in ``out_dir``; refuse to overwrite."""
    out_dir.mkdir(parents=True, exist_ok=True)
    private_path, public_path = out_dir / f"{stem}.key", out_dir / f"{stem}.pub"
    for path in (private_path, public_path):
        if path.exists():
            raise ValidationToolError(f"{path}: already exists; refusing to overwrite a key")
    private_key = Ed25519PrivateKey.generate()
    pem = private_key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )
    fd = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as handle:
        handle.write(pem)
    public_path.write_bytes(public_pem(private_key.public_key()))
    return private_path, public_path


def load_private_key(path: Path) -> Ed25519PrivateKey:
    try:
        key = serialization.load_pem_private_key(Path(path).read_bytes(), password=None)
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: private key file not found") from None
    except (ValueError, TypeError):
        raise ValidationToolError(f"{path}: not a PEM private key") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise ValidationToolError(f"{path}: key is not an Ed25519 key")
    return key


def parse_public_key(data: bytes, source: str) -> Ed25519PublicKey:
    try:
        key = serialization.load_pem_public_key(data)
    except (ValueError, TypeError):
        raise ValidationToolError(f"{source}: not a PEM public key") from None
    if not isinstance(key, Ed25519PublicKey):
        raise ValidationToolError(f"{source}: key is not an Ed25519 key")
    return key


def load_public_key(path: Path) -> Ed25519PublicKey:
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: public key file not found") from None
    return parse_public_key(data, str(path))


def sign(private_key: Ed25519PrivateKey, message: bytes) -> str:
    return base64.b64encode(private_key.sign(message)).decode("ascii")


def verify(public_key: Ed25519PublicKey, message: bytes, signature_b64: str) -> bool:
    try:
        signature = base64.b64decode(signature_b64, validate=True)
        public_key.verify(signature, message)
    except (InvalidSignature, ValueError, TypeError):
        return False
    return True


@dataclass(frozen=True)
class KeyRing:
    """Public keys a party has pinned, by key id."""

    keys: dict[str, Ed25519PublicKey]

    @classmethod
    def from_paths(cls, paths: list[Path]) -> KeyRing:
        keys = {}
        for path in paths:
            key = load_public_key(path)
            keys[key_id(key)] = key
        return cls(keys)

    def verify(self, signer_key_id: str, message: bytes, signature_b64: str, what: str) -> None:
        """Raise :class:`SignatureError` unless ``signer_key_id`` is pinned and the signature verifies."""
        key = self.keys.get(signer_key_id)
        if key is None:
            raise SignatureError(f"{what}: signed by key {signer_key_id!r}, which is not pinned here")
        if not verify(key, message, signature_b64):
            raise SignatureError(f"{what}: signature does not verify (altered or forged)")
