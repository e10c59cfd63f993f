"""The site folder: configuration, disclosure policy, keys and trusted coordinator keys.

Layout made by ``site-agent init``::

    SITEDIR/site.toml          site id, disclosure policy, trusted coordinator keys, data location
    SITEDIR/site.key, site.pub the site's release-signing key pair (Ed25519; the private key is mode 0600)
    SITEDIR/node.key, node.pub the site's node key for joining the coordinator's SuperLink (EC P-384, OpenSSH)
    SITEDIR/trusted/*.pub      coordinator public keys the site accepts requests and bundles from
    SITEDIR/ledger.jsonl       append-only, hash-chained, signed record of everything that happened
    SITEDIR/releases/          copies of every release written
"""

from __future__ import annotations

import re
import shutil
import tomllib
from dataclasses import dataclass, replace
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

from .sources import SourceSpec

_SITE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
_SHA256 = re.compile(r"^[0-9a-fA-F]{64}$")

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
# How many different studies this site answers at most, in all (a rate limit: the differencing check
# already takes every release this site ever made, to every study, together).
max_studies = 20
# Variables (schema features) a request may split results by in the subgroups analysis; a request naming
# any other variable is refused.
allowed_subgroups = ["age_months", "sex"]
# Whether a person must approve each release before it leaves (`site-agent review`, then `approve` or
# `reject`). While a release waits, nothing is sent and the coordinator is told it is held.
require_approval = false
# Whether the site must approve each new model bundle (by its SHA-256) before the agent runs it on any record
# (`site-agent model review`, then `model approve` or `model reject`). A coordinator can sign any model; with
# this on, a person at the site sees what each model is (its inputs, its kind, a scorecard's weights) first,
# as the ethics board approves a protocol. Recommended: true.
require_model_approval = true
# Before anything leaves, the agent checks everything this site has released, to every study, taken
# together: a hidden count must stay uncertain. This is how many different whole numbers must remain
# possible for it (2, the least allowed = it can never be worked out exactly; larger is stricter).
protection_width = 2

[policy.min_band_width]
# The narrowest band a request may ask for, per numeric variable, in the variable's own unit (for example
# age_months = 6 refuses age bands narrower than six months; score = 0.05 for score bands). Variables not
# listed may be banded as finely as a request asks; every band is still subject to min_cell_size.
# age_months = 6

[trust]
# Coordinator public keys this site accepts requests and model bundles from (paths relative to this folder).
coordinator_keys = [{trusted}]

[data]
# Where the local records are and how their columns map to the model's inputs (used when the agent runs
# online; `site-agent run --data/--mapping` override them). Paths relative to this folder, or absolute.
# path = "data.csv"                 # a CSV (.csv) or Parquet (.parquet) file
# mapping = "mapping.toml"
# Or a SQL database (read-only; instead of path): a SQLAlchemy URL and a table name or one SELECT.
# A password is better kept out of this file (PGPASSWORD or ~/.pgpass for PostgreSQL).
# url = "postgresql+psycopg://reader@dbhost/clinic"   # or "sqlite:///records.db"
# table = "screening_export"
# query = "SELECT * FROM screening_export WHERE visit = 1"

[app]
# SHA-256 of the app bundles (Flower FABs) this site agrees to run online; anything else is refused.
# `site-agent app hash` prints the hash of the bundle built from the agent installed here.
allowed_fab_sha256 = []
"""


@dataclass(frozen=True)
class Policy:
    min_cell_size: int = 10
    allow_zero: bool = True
    allowed_analyses: tuple[str, ...] = ANALYSES
    max_requests_per_study: int = 20
    max_studies: int = 20
    require_approval: bool = False
    require_model_approval: bool = False  # absent from an older site.toml: off (`site-agent init` writes true)
    protection_width: int = 2
    min_band_width: tuple[tuple[str, float], ...] = ()  # (variable, narrowest band), sorted by variable
    trusted_coordinator_keys: tuple[str, ...] = ()  # key ids of [trust].coordinator_keys, sorted
    allowed_subgroups: tuple[str, ...] = ("age_months", "sex")

    def to_dict(self) -> dict[str, Any]:
        return {
            "min_cell_size": self.min_cell_size,
            "allow_zero": self.allow_zero,
            "allowed_analyses": list(self.allowed_analyses),
            "max_requests_per_study": self.max_requests_per_study,
            "max_studies": self.max_studies,
            "require_approval": self.require_approval,
            "require_model_approval": self.require_model_approval,
            "protection_width": self.protection_width,
            "min_band_width": dict(self.min_band_width),
            "trusted_coordinator_keys": list(self.trusted_coordinator_keys),
            "allowed_subgroups": list(self.allowed_subgroups),
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
    allowed_fab_sha256: tuple[str, ...] = ()
    data_url: str | None = None  # a SQL source: SQLAlchemy URL with data_table or data_query
    data_table: str | None = None
    data_query: str | None = None

    def source(self, data: Path | str | None = None) -> SourceSpec:
        """Where records are read from: ``data`` (a path or URL given on the command line) or [data]."""
        if data is not None:
            text = str(data)
            if "://" in text:
                return SourceSpec(url=text, table=self.data_table, query=self.data_query)
            return SourceSpec(path=Path(data))
        if self.data_url is not None:
            return SourceSpec(url=self.data_url, table=self.data_table, query=self.data_query)
        if self.data_path is None:
            raise ValidationToolError("no data: give --data or set [data].path or [data].url in site.toml")
        return SourceSpec(path=self.data_path)

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
    keys = [(path, load_public_key(path)) for path in trusted_keys]  # a bad key file stops before anything is made
    out.mkdir(parents=True, exist_ok=True)
    out.chmod(0o700)  # the folder holds the private keys, the ledger and the held releases: its owner only
    (out / "trusted").mkdir(exist_ok=True)
    (out / "releases").mkdir(exist_ok=True)
    (out / "held").mkdir(exist_ok=True)  # releases held for a person's approval
    pinned = []
    for path, key in keys:
        target = out / "trusted" / f"coordinator-{key_id(key)}.pub"
        shutil.copyfile(path, target)
        pinned.append(f'"trusted/{target.name}"')
    write_keypair(out, "site")
    from .supernode import write_node_key  # late import: supernode imports this module

    write_node_key(out)
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
    policy = replace(policy, trusted_coordinator_keys=tuple(sorted(trusted.keys)))
    data = doc.get("data", {})
    if not isinstance(data, dict):
        raise DocumentError(f"{path}: [data] must be a table")
    data_path = _resolve(root, data["path"]) if isinstance(data.get("path"), str) else None
    mapping_path = _resolve(root, data["mapping"]) if isinstance(data.get("mapping"), str) else None
    allowed = _allowed_fab_hashes(doc.get("app", {}), f"{path}: [app]")
    sql = {key: data.get(key) for key in ("url", "table", "query")}
    for key, value in sql.items():
        if value is not None and (not isinstance(value, str) or not value.strip()):
            raise DocumentError(f"{path}: [data].{key} must be text")
    if sql["url"] is not None and (data_path is not None or (sql["table"] is None) == (sql["query"] is None)):
        raise DocumentError(f"{path}: [data] with url needs exactly one of table or query, and no path")
    return Site(
        root, site_id, policy, trusted, data_path, mapping_path, allowed, sql["url"], sql["table"], sql["query"]
    )


def _allowed_fab_hashes(raw: Any, where: str) -> tuple[str, ...]:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    hashes = raw.get("allowed_fab_sha256", [])
    if not isinstance(hashes, list) or not all(isinstance(h, str) and _SHA256.match(h) for h in hashes):
        raise DocumentError(f"{where}.allowed_fab_sha256: must list SHA-256 hashes (64 hex digits)")
    return tuple(h.lower() for h in hashes)


def _resolve(root: Path, value: str) -> Path:
    candidate = Path(value)
    return candidate if candidate.is_absolute() else root / candidate


def _policy(raw: Any, where: str) -> Policy:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    known = {
        "min_cell_size",
        "allow_zero",
        "allowed_analyses",
        "max_requests_per_study",
        "max_studies",
        "require_approval",
        "require_model_approval",
        "protection_width",
        "min_band_width",
        "allowed_subgroups",
    }
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
    max_studies = raw.get("max_studies", 20)
    if isinstance(max_studies, bool) or not isinstance(max_studies, int) or max_studies < 1:
        raise DocumentError(f"{where}.max_studies: must be a whole number of at least 1")
    require_approval = raw.get("require_approval", False)
    if not isinstance(require_approval, bool):
        raise DocumentError(f"{where}.require_approval: must be true or false")
    require_model_approval = raw.get("require_model_approval", False)
    if not isinstance(require_model_approval, bool):
        raise DocumentError(f"{where}.require_model_approval: must be true or false")
    width = raw.get("protection_width", 2)
    if isinstance(width, bool) or not isinstance(width, int) or not 2 <= width <= 1000:
        # 1 would let a hidden count be worked out exactly: the audit would have nothing to check
        raise DocumentError(
            f"{where}.protection_width: must be a whole number from 2 to 1000 (2: a hidden count can never be "
            "worked out exactly)"
        )
    bands = raw.get("min_band_width", {})
    if not isinstance(bands, dict) or not all(
        isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0 for v in bands.values()
    ):
        raise DocumentError(f"{where}.min_band_width: must map variable names to positive numbers")
    subgroups = raw.get("allowed_subgroups", ["age_months", "sex"])
    if not isinstance(subgroups, list) or not all(isinstance(v, str) and v for v in subgroups):
        raise DocumentError(f"{where}.allowed_subgroups: must list variable names (schema features)")
    return Policy(
        allowed_subgroups=tuple(subgroups),
        min_cell_size=k,
        allow_zero=allow_zero,
        allowed_analyses=tuple(analyses),
        max_requests_per_study=max_requests,
        max_studies=max_studies,
        require_approval=require_approval,
        require_model_approval=require_model_approval,
        protection_width=width,
        min_band_width=tuple(sorted((str(name), float(v)) for name, v in bands.items())),
    )
