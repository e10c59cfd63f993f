"""Is this site ready for a real round? What ``federation run --ping`` asks, answered without reading records.

A readiness check walks what a validation request would need, in the order a request needs it, and stops
at the first thing missing:

``site folder``    ``site.toml`` reads and names this site
``policy``         the ``[policy]`` table is valid (checked with the folder: both are one file)
``keys``           ``site.key`` loads and ``site.pub`` is its public half; at least one coordinator key is pinned
``ledger``         the ledger exists, is writable and its last entry is complete
``app allowlist``  the app bundle this process runs is listed (in deployment the site's launcher checked the
                   exact bytes before this code was imported; in simulation there is no bundle to check)
``data source``    the file exists, is a readable, non-empty file (the mapping file too, when one is set);
                   a database accepts a read-only connection and the table exists. No record is read.

The result is a fixed set of fields (status, category, reason, the checks passed, the app bundle hash): no
count, no value, and a reason that never holds a path of the site's file system (:func:`shareable`).
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from federation.protocol import ValidationToolError

CHECKS = ("site folder", "policy", "keys", "ledger", "app allowlist", "data source")

# An absolute path, with an optional URL scheme in front (sqlite:////srv/site/records.db).
_PATH = re.compile(r"(?:\b[A-Za-z][\w+.-]*://)?(?<![\w.])/(?:[^\s'\"(),;:<>]+)")


def shareable(reason: str, site_dir: Path | None = None) -> str:
    """A reason fit to leave the site: every file-system path in it replaced by a neutral placeholder.

    The full reason stays in the site's own ledger and log; what travels names the file's role and the
    rule broken, not where the site keeps its files (folder layouts can name people, projects or hosts).
    """
    text = str(reason)
    if site_dir is not None:
        for root in {str(Path(site_dir)), str(Path(site_dir).resolve())}:
            text = text.replace(root + os.sep, "SITEDIR/").replace(root, "SITEDIR")
    return _PATH.sub(_placeholder, text)[:500]


def _placeholder(match: re.Match[str]) -> str:
    found = match.group(0)
    if found.startswith("SITEDIR"):
        return found
    return "[a path at the site]"


@dataclass
class Readiness:
    site_id: str = ""
    status: str = "ready"  # ready | failed
    category: str = ""  # the first check that failed
    reason: str = ""
    passed: list[str] = field(default_factory=list)
    app_bundle_sha256: str = ""

    def fields(self) -> dict[str, str | list[str]]:
        """The reply's fields (Flower ConfigRecord values: text and a list of text)."""
        result: dict[str, str | list[str]] = {"status": self.status, "site_id": self.site_id, "kind": "readiness"}
        if self.passed:
            result["checks"] = list(self.passed)
        if self.status != "ready":
            result["category"] = self.category
            result["reason"] = self.reason
        if self.app_bundle_sha256:
            result["app_bundle_sha256"] = self.app_bundle_sha256
        return result


class _NotReady(Exception):
    def __init__(self, category: str, reason: str) -> None:
        super().__init__(reason)
        self.category = category


def check_readiness(site_dir: Path | None, app_bundle_sha256: str | None) -> Readiness:
    """Run every check in :data:`CHECKS`; the result says which passed and why the first failing one failed.

    ``app_bundle_sha256`` is the hash the site's launcher verified for this process, or ``None`` when no
    launcher ran (simulation, tests).
    """
    result = Readiness()
    try:
        _run_checks(result, site_dir, app_bundle_sha256)
    except _NotReady as exc:
        result.status, result.category = "failed", exc.category
        result.reason = shareable(f"{exc.category}: {exc}", site_dir)
    except Exception as exc:  # an unexpected failure: its kind only, never its text (it may quote a file)
        failed = CHECKS[len(result.passed)] if len(result.passed) < len(CHECKS) else "site agent"
        result.status, result.category = "failed", failed
        result.reason = f"{failed}: internal error ({type(exc).__name__})"
    return result


def _run_checks(result: Readiness, site_dir: Path | None, app_bundle_sha256: str | None) -> None:
    from .config import load_site

    if site_dir is None:
        raise _NotReady("site folder", "this node has no site folder (set node config site-dir)")
    if not (Path(site_dir) / "site.toml").is_file():
        raise _NotReady("site folder", f"{Path(site_dir) / 'site.toml'}: not found (made by `site-agent init`)")
    try:
        site = load_site(Path(site_dir))
    except ValidationToolError as exc:
        category = "policy" if "[policy]" in str(exc) else "site folder"
        raise _NotReady(category, str(exc)) from None
    result.site_id = site.site_id
    result.passed += ["site folder", "policy"]

    try:
        private, public = site.private_key(), site.public_key()
    except (ValidationToolError, OSError) as exc:
        raise _NotReady("keys", str(exc)) from None
    from cryptography.hazmat.primitives import serialization

    raw = serialization.Encoding.Raw, serialization.PublicFormat.Raw
    if private.public_key().public_bytes(*raw) != public.public_bytes(*raw):
        raise _NotReady("keys", "site.pub is not the public half of site.key (restore the pair made by init)")
    if not site.trusted.keys:
        raise _NotReady("keys", "no coordinator key is pinned ([trust].coordinator_keys)")
    result.passed.append("keys")

    _check_ledger(site.ledger_path)
    result.passed.append("ledger")

    if app_bundle_sha256 is not None:
        if app_bundle_sha256 not in site.allowed_fab_sha256:  # the launcher checked already; say it again
            raise _NotReady("app allowlist", f"app bundle sha256 {app_bundle_sha256} is not in this site's allowlist")
        result.app_bundle_sha256 = app_bundle_sha256
    result.passed.append("app allowlist")

    _check_source(site)
    result.passed.append("data source")


def _check_ledger(path: Path) -> None:
    if not path.is_file():
        raise _NotReady("ledger", f"{path}: not found (the site folder's ledger.jsonl)")
    if not os.access(path, os.R_OK | os.W_OK):
        raise _NotReady("ledger", f"{path}: the agent may not read and append to it (file permissions)")
    size = path.stat().st_size
    if size:
        with open(path, "rb") as handle:
            handle.seek(size - 1)
            if handle.read(1) != b"\n":
                raise _NotReady("ledger", f"{path}: the last entry is incomplete; run `site-agent ledger verify`")


def _check_file(path: Path, what: str) -> None:
    if not path.exists():
        raise _NotReady("data source", f"{path}: {what} not found")
    if not path.is_file():
        raise _NotReady("data source", f"{path}: is not a file ({what})")
    try:
        with open(path, "rb"):  # opened and closed: nothing is read
            pass
    except PermissionError:
        raise _NotReady("data source", f"{path}: no permission to read the {what}") from None
    except OSError as exc:
        raise _NotReady("data source", f"{path}: the {what} cannot be opened ({type(exc).__name__})") from None
    if path.stat().st_size == 0:
        raise _NotReady("data source", f"{path}: the {what} is empty")


def _check_source(site: object) -> None:
    from .config import Site

    assert isinstance(site, Site)
    if site.mapping_path is not None:
        _check_file(site.mapping_path, "mapping file")
    try:
        spec = site.source()
    except ValidationToolError as exc:
        raise _NotReady("data source", str(exc)) from None
    if spec.path is not None:
        _check_file(Path(spec.path), "data file")
        return
    _check_database(spec)


def _check_database(spec: object) -> None:
    """Open a read-only connection and look the table up in the catalogue; no query over records is run."""
    import sqlalchemy
    from sqlalchemy.exc import DBAPIError, SQLAlchemyError

    from .sources import _TABLE_NAME, _connection_problem, _engine, check_select

    where = spec.describe()  # type: ignore[attr-defined]
    try:
        if spec.query is not None:  # type: ignore[attr-defined]
            check_select(spec.query, f"{where}: query")  # type: ignore[attr-defined]
        elif not _TABLE_NAME.match(spec.table or ""):  # type: ignore[attr-defined]
            raise _NotReady("data source", f"{where}: table must be a name of letters, digits and _")
        engine = _engine(spec)
    except ValidationToolError as exc:
        raise _NotReady("data source", str(exc)) from None
    try:
        connection = engine.connect()
    except (DBAPIError, SQLAlchemyError, OSError) as exc:
        engine.dispose()
        raise _NotReady("data source", f"{where}: cannot connect ({_connection_problem(exc)})") from None
    try:
        if spec.table is not None:  # type: ignore[attr-defined]
            schema, _, name = spec.table.rpartition(".")  # type: ignore[attr-defined]
            if not sqlalchemy.inspect(connection).has_table(name, schema=schema or None):
                raise _NotReady("data source", f"{where}: the table does not exist")
    except (DBAPIError, SQLAlchemyError) as exc:
        raise _NotReady("data source", f"{where}: cannot look the table up ({type(exc).__name__})") from None
    finally:
        connection.close()
        engine.dispose()
