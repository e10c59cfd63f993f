"""Canonical JSON: the exact bytes that are hashed and signed."""

from __future__ import annotations

import hashlib
import json
from typing import Any


def canonical_bytes(document: Any) -> bytes:
    """Serialise ``document`` with sorted keys, no whitespace, ASCII escapes and no NaN."""
    return json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False).encode(
        "ascii"
    )


def sha256_hex(data: bytes) -> str:
    """Hex SHA-256 of ``data``."""
    return hashlib.sha256(data).hexdigest()
