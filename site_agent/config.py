"""The site folder: configuration, disclosure policy, keys and trusted coordinator keys.

Layout made by ``site-agent init``::

    SITEDIR/site.toml          site id, disclosure policy, trusted coordinator keys, data location
    SITEDIR/site.key, site.pub the site's release-signing key pair (Ed25519; the private key is mode 0600)
    SITEDIR/trusted/*.pub      coordinator public keys the site accepts requests and bundles from
    SITEDIR/ledger.jsonl       append-only, hash-chained, signed record of everything that happened
    SITEDIR/releases/          copies of every release written
"""

from __future__ import annotations

import re
import shutil
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from federation.protocol import (
    DocumentError,
    KeyRing,
    ValidationToolError,
    canonical_bytes,
    key_id,
    load_private_key,
    load_public_key,
    sha256_hex,
    write_keypair,
)
from federation.protocol.documents import ANALYSES

_SITE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")

SITE_TOML = """\
# Site configuration for the validation agent. This file is the site's disclosure policy: read it, change
# it with the ethics board or data custodian, and keep it under change control. Every release states the
# policy in force and its SHA-256.

site_id = "{site_id}"

[policy]
# Every released count is 0 or at least this many records, or it is suppressed (shown as null).
# 5, 10 and 11 are all common practice; 10 is the default.
min_cell_size = 10
# Whether a count of exactly 0 may be shown. If false, zeros are suppressed like small counts.
allow_zero = true
# Analyses this site will run when a request asks for them.
allowed_analyses = {analyses}
# How many different requests of one study this site answers at most.
max_requests_per_study = 20

[trust]
# Coordinator public keys this site accepts requests and model bundles from (paths relative to this folder).
coordinator_keys = [{trusted}]

[data]
# Where the local records are and how their columns map to the model's inputs (used when the agent runs
# online; `site-agent run --data/--mapping` override them). Paths relative to this folder, or absolute.
# path = "data.csv"
# mapping = "mapping.toml"
"""


@dataclass(frozen=True)
class Policy:
    min_cell_size: int = 10
    allow_zero: bool = True
    allowed_analyses: tuple[str, ...] = ANALYSES
    max_requests_per_study: int = 20

    def to_dict(self) -> dict[str, Any]:
        return {
            "min_cell_size": self.min_cell_size,
            "allow_zero": self.allow_zero,
            "allowed_analyses": list(self.allowed_analyses),
            "max_requests_per_study": self.max_requests_per_study,
        }

    def release_statement(self) -> dict[str, Any]:
        """What every release says about the policy in force."""
        return {**self.to_dict(), "policy_sha256": sha256_hex(canonical_bytes(self.to_dict()))}


@dataclass(frozen=True)
class Site:
    root: Path
    site_id: str
    policy: Policy
    trusted: KeyRing
    data_path: Path | None
    mapping_path: Path | None

    @property
    def ledger_path(self) -> Path:
        return self.root / "ledger.jsonl"

    @property
    def releases_dir(self) -> Path:
        return self.root / "releases"

    def private_key(self):  # noqa: ANN201 - Ed25519PrivateKey
        return load_private_key(self.root / "site.key")

    def public_key(self):  # noqa: ANN201 - Ed25519PublicKey
        return load_public_key(self.root / "site.pub")


def init_site(out: Path, site_id: str, trusted_keys: list[Path]) -> Path:
    """Create a site folder with a default policy, a fresh key pair and pinned coordinator keys."""
    if not _SITE_ID.match(site_id):
        raise ValidationToolError("--site-id: use letters, digits, '.', '_' or '-' (at most 64)")
    if (out / "site.toml").exists():
        raise ValidationToolError(f"{out}: already holds a site.toml; refusing to overwrite")
    if not trusted_keys:
        raise ValidationToolError("--trust: name at least one coordinator public key")
    (out / "trusted").mkdir(parents=True, exist_ok=True)
    (out / "releases").mkdir(exist_ok=True)
    pinned = []
    for path in trusted_keys:
        key = load_public_key(path)
        target = out / "trusted" / f"coordinator-{key_id(key)}.pub"
        shutil.copyfile(path, target)
        pinned.append(f'"trusted/{target.name}"')
    write_keypair(out, "site")
    analyses = "[" + ", ".join(f'"{a}"' for a in ANALYSES) + "]"
    (out / "site.toml").write_text(SITE_TOML.format(site_id=site_id, analyses=analyses, trusted=", ".join(pinned)))
    (out / "ledger.jsonl").touch()
    return out


def load_site(root: Path) -> Site:
    path = root / "site.toml"
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: not found (create the site folder with `site-agent init`)") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise DocumentError(f"{path}: not valid TOML ({exc})") from None
    site_id = doc.get("site_id")
    if not isinstance(site_id, str) or not _SITE_ID.match(site_id):
        raise DocumentError(f"{path}: site_id must be letters, digits, '.', '_' or '-'")
    policy = _policy(doc.get("policy", {}), f"{path}: [policy]")
    trust = doc.get("trust", {})
    keys = trust.get("coordinator_keys", []) if isinstance(trust, dict) else None
    if not isinstance(keys, list) or not keys or not all(isinstance(k, str) for k in keys):
        raise DocumentError(f"{path}: [trust].coordinator_keys must list at least one key file")
    trusted = KeyRing.from_paths([_resolve(root, k) for k in keys])
    data = doc.get("data", {})
    if not isinstance(data, dict):
        raise DocumentError(f"{path}: [data] must be a table")
    data_path = _resolve(root, data["path"]) if isinstance(data.get("path"), str) else None
    mapping_path = _resolve(root, data["mapping"]) if isinstance(data.get("mapping"), str) else None
    return Site(root, site_id, policy, trusted, data_path, mapping_path)


def _resolve(root: Path, value: str) -> Path:
    candidate = Path(value)
    return candidate if candidate.is_absolute() else root / candidate


def _policy(raw: Any, where: str) -> Policy:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    known = {"min_cell_size", "allow_zero", "allowed_analyses", "max_requests_per_study"}
    unknown = sorted(set(raw) - known)
    if unknown:
        raise DocumentError(f"{where}: unknown setting {unknown[0]!r}")
    k = raw.get("min_cell_size", 10)
    if isinstance(k, bool) or not isinstance(k, int) or not 1 <= k <= 1000:
        raise DocumentError(f"{where}.min_cell_size: must be a whole number from 1 to 1000")
    allow_zero = raw.get("allow_zero", True)
    if not isinstance(allow_zero, bool):
        raise DocumentError(f"{where}.allow_zero: must be true or false")
    analyses = raw.get("allowed_analyses", list(ANALYSES))
    if not isinstance(analyses, list) or any(a not in ANALYSES for a in analyses):
        raise DocumentError(f"{where}.allowed_analyses: must list analyses among {', '.join(ANALYSES)}")
    max_requests = raw.get("max_requests_per_study", 20)
    if isinstance(max_requests, bool) or not isinstance(max_requests, int) or max_requests < 1:
        raise DocumentError(f"{where}.max_requests_per_study: must be a whole number of at least 1")
    return Policy(k, allow_zero, tuple(analyses), max_requests)
