"""Request (coordinator → site) and release (site → coordinator) documents.

Both are versioned JSON, validated on parse: an unknown version, a missing field or a wrong type raises
:class:`DocumentError` naming the field. Both carry an Ed25519 signature over the canonical JSON of every
other field.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from .canonical import canonical_bytes, sha256_hex
from .errors import DocumentError
from .keys import KeyRing, key_id, sign

VERSION = 1
MAX_DOCUMENT_BYTES = 8 * 1024 * 1024
# The closed vocabulary of analyses a request may name, and the parameters each takes.
ANALYSES = ("confusion", "roc", "calibration", "subgroups", "margin", "agreement", "paired")
ANALYSIS_PARAMETERS = {
    "confusion": ("thresholds",),
    "roc": ("bands",),
    "calibration": ("bands",),
    "subgroups": ("variables",),
    "margin": ("thresholds", "bands"),
    "agreement": ("thresholds",),
    "paired": ("thresholds", "compare_bundle_sha256"),
}
MAX_THRESHOLDS = 50
MAX_BANDS = 100
MAX_SUBGROUP_VARIABLES = 10
MAX_SUBGROUP_EDGES = 50
CELLS = ("tp", "fp", "fn", "tn")
_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_KEY_ID = re.compile(r"^[0-9a-f]{16}$")
_VARIABLE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")


class _NotFinite(ValueError):
    pass


def _no_constant(name: str) -> float:
    raise _NotFinite(name)


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):  # 1e400 parses as infinity
        raise _NotFinite(text)
    return value


def parse_json(data: bytes, source: str) -> dict[str, Any]:
    if len(data) > MAX_DOCUMENT_BYTES:
        raise DocumentError(f"{source}: larger than {MAX_DOCUMENT_BYTES // (1024 * 1024)} MiB")
    try:
        doc = json.loads(data, parse_constant=_no_constant, parse_float=_finite_float)
    except _NotFinite:
        raise DocumentError(f"{source}: a number is not finite (NaN and infinities are not JSON numbers)") from None
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise DocumentError(f"{source}: not a JSON document") from None
    except RecursionError:
        raise DocumentError(f"{source}: JSON nested too deeply") from None
    if not isinstance(doc, dict):
        raise DocumentError(f"{source}: must be a JSON object")
    return doc


def _get(doc: dict[str, Any], name: str, kind: type | tuple[type, ...], where: str) -> Any:
    if name not in doc:
        raise DocumentError(f"{where}: missing field {name!r}")
    value = doc[name]
    if isinstance(value, bool) and bool not in (kind if isinstance(kind, tuple) else (kind,)):
        raise DocumentError(f"{where}.{name}: wrong type")
    if not isinstance(value, kind):
        raise DocumentError(f"{where}.{name}: wrong type")
    return value


def _identifier(doc: dict[str, Any], name: str, where: str, pattern: re.Pattern[str] = _ID) -> str:
    value = _get(doc, name, str, where)
    if not pattern.match(value):
        raise DocumentError(f"{where}.{name}: malformed identifier")
    return value


def _check_header(doc: dict[str, Any], kind: str, source: str) -> None:
    if doc.get("kind") != kind:
        raise DocumentError(f"{source}: not a {kind} document (field 'kind')")
    version = doc.get("version")
    if version != VERSION:
        raise DocumentError(f"{source}: unsupported {kind} version (field 'version'; this tool reads {VERSION})")


def _count(value: Any, where: str) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 0 or value > 2**53:
        raise DocumentError(f"{where}: a count must be a non-negative integer or null")
    return value


def _signed(body: dict[str, Any], private_key: Ed25519PrivateKey) -> dict[str, Any]:
    return {**body, "signature": sign(private_key, canonical_bytes(body))}


def _unsigned(doc: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in doc.items() if k != "signature"}


def _numbers(raw: Any, where: str, limit: int, increasing: bool) -> tuple[float, ...]:
    if not isinstance(raw, list) or len(raw) > limit:
        raise DocumentError(f"{where}: must be a list of at most {limit} numbers")
    values = []
    for value in raw:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise DocumentError(f"{where}: must hold finite numbers only")
        values.append(float(value))
    if increasing and any(b <= a for a, b in zip(values, values[1:], strict=False)):
        raise DocumentError(f"{where}: must be strictly increasing")
    return tuple(values)


@dataclass(frozen=True)
class SubgroupSpec:
    """A subgroup variable (a schema feature); ``edges`` cut a numeric one into bands low <= value < high."""

    variable: str
    edges: tuple[float, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.variable}
        if self.edges:
            out["edges"] = list(self.edges)
        return out

    @classmethod
    def from_dict(cls, raw: Any, where: str) -> SubgroupSpec:
        if not isinstance(raw, dict):
            raise DocumentError(f"{where}: must be an object")
        unknown = sorted(set(raw) - {"name", "edges"})
        if unknown:
            raise DocumentError(f"{where}: unknown field {str(unknown[0])[:40]!r} (allowed: name, edges)")
        name = _get(raw, "name", str, where)
        if not _VARIABLE.match(name):
            raise DocumentError(f"{where}.name: must be a schema feature name")
        edges = _numbers(raw.get("edges", []), f"{where}.edges", MAX_SUBGROUP_EDGES, increasing=True)
        return cls(name, edges)


@dataclass(frozen=True)
class AnalysisSpec:
    """One analysis a request names, with its parameters (see ``ANALYSIS_PARAMETERS``).

    ``thresholds``: screen-positive when score >= threshold (default: the bundle's); ``bands``: strictly
    increasing edges (ROC score bands, calibration risk bins, margin distances); ``subgroups``: the
    variables of a ``subgroups`` analysis; ``compare_bundle_sha256``: the second bundle of ``paired``.
    """

    name: str
    thresholds: tuple[float, ...] = ()
    bands: tuple[float, ...] = ()
    subgroups: tuple[SubgroupSpec, ...] = ()
    compare_bundle_sha256: str = ""

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name}
        if self.thresholds:
            out["thresholds"] = list(self.thresholds)
        if self.bands:
            out["bands"] = list(self.bands)
        if self.subgroups:
            out["variables"] = [v.to_dict() for v in self.subgroups]
        if self.compare_bundle_sha256:
            out["compare_bundle_sha256"] = self.compare_bundle_sha256
        return out

    @classmethod
    def from_dict(cls, raw: Any, where: str) -> AnalysisSpec:
        if not isinstance(raw, dict):
            raise DocumentError(f"{where}: must be an object")
        name = _get(raw, "name", str, where)
        if name not in ANALYSES:
            raise DocumentError(f"{where}.name: unknown analysis (known: {', '.join(ANALYSES)})")
        allowed = ANALYSIS_PARAMETERS[name]
        unknown = sorted(set(raw) - {"name", *allowed})
        if unknown:
            raise DocumentError(
                f"{where}: {name} takes no field {str(unknown[0])[:40]!r} (allowed: {', '.join(allowed) or 'none'})"
            )
        thresholds = _numbers(raw.get("thresholds", []), f"{where}.thresholds", MAX_THRESHOLDS, increasing=False)
        bands = _numbers(raw.get("bands", []), f"{where}.bands", MAX_BANDS, increasing=True)
        if name == "margin" and any(b <= 0 for b in bands):
            raise DocumentError(f"{where}.bands: margin distances must be positive")
        subgroups: tuple[SubgroupSpec, ...] = ()
        if name == "subgroups":
            variables = _get(raw, "variables", list, where)
            if not 1 <= len(variables) <= MAX_SUBGROUP_VARIABLES:
                raise DocumentError(f"{where}.variables: must name between 1 and {MAX_SUBGROUP_VARIABLES} variables")
            subgroups = tuple(SubgroupSpec.from_dict(v, f"{where}.variables[{i}]") for i, v in enumerate(variables))
            if len({v.variable for v in subgroups}) != len(subgroups):
                raise DocumentError(f"{where}.variables: a variable is named twice")
        compare = ""
        if name == "paired":
            compare = _identifier(raw, "compare_bundle_sha256", where, _HEX64)
            if len(thresholds) > 2:
                raise DocumentError(f"{where}.thresholds: paired takes at most two (this model's, the other's)")
        return cls(name, thresholds, bands, subgroups, compare)


@dataclass(frozen=True)
class Request:
    study_id: str
    request_id: str
    bundle_sha256: str
    analyses: tuple[AnalysisSpec, ...]
    issued_at: str
    coordinator_key_id: str = ""
    signature: str = ""

    def body(self) -> dict[str, Any]:
        return {
            "kind": "request",
            "version": VERSION,
            "study_id": self.study_id,
            "request_id": self.request_id,
            "bundle_sha256": self.bundle_sha256,
            "analyses": [a.to_dict() for a in self.analyses],
            "issued_at": self.issued_at,
            "coordinator_key_id": self.coordinator_key_id,
        }

    @property
    def compare_bundle_sha256(self) -> str:
        """The second bundle of a paired comparison ("" when the request names none)."""
        return next((a.compare_bundle_sha256 for a in self.analyses if a.name == "paired"), "")

    def signed_bytes(self, private_key: Ed25519PrivateKey) -> bytes:
        body = {**self.body(), "coordinator_key_id": key_id(private_key.public_key())}
        return json.dumps(_signed(body, private_key), indent=2, sort_keys=True).encode() + b"\n"

    @classmethod
    def from_bytes(cls, data: bytes, trusted: KeyRing | None, source: str = "request") -> Request:
        """Parse and validate; when ``trusted`` is given, verify the coordinator's signature first."""
        doc = parse_json(data, source)
        _check_header(doc, "request", source)
        signer = _identifier(doc, "coordinator_key_id", source, _KEY_ID)
        signature = _get(doc, "signature", str, source)
        if trusted is not None:
            trusted.verify(signer, canonical_bytes(_unsigned(doc)), signature, source)
        raw_analyses = _get(doc, "analyses", list, source)
        if not raw_analyses or len(raw_analyses) > 50:
            raise DocumentError(f"{source}.analyses: must name between 1 and 50 analyses")
        analyses = tuple(AnalysisSpec.from_dict(a, f"{source}.analyses[{i}]") for i, a in enumerate(raw_analyses))
        names = [a.name for a in analyses if a.name != "confusion"]  # several confusion specs add thresholds
        if len(set(names)) != len(names):
            raise DocumentError(f"{source}.analyses: an analysis other than confusion is named twice")
        return cls(
            study_id=_identifier(doc, "study_id", source),
            request_id=_identifier(doc, "request_id", source),
            bundle_sha256=_identifier(doc, "bundle_sha256", source, _HEX64),
            analyses=analyses,
            issued_at=_get(doc, "issued_at", str, source)[:64],
            coordinator_key_id=signer,
            signature=signature,
        )


# The rule that withheld a count (release ``suppressed_by`` maps; see docs/formats.md).
WITHHELD_RULES = ("minimum_cell_size", "complementary", "audit", "coarsened")


@dataclass(frozen=True)
class ConfusionTable:
    threshold: float
    cells: dict[str, int | None]  # tp, fp, fn, tn; None = suppressed
    suppressed: tuple[str, ...] = ()
    suppressed_by: dict[str, str] = field(default_factory=dict)  # withheld cell -> rule (WITHHELD_RULES)

    def to_dict(self) -> dict[str, Any]:
        return {
            "threshold": self.threshold,
            "cells": dict(self.cells),
            "suppressed": list(self.suppressed),
            "suppressed_by": dict(self.suppressed_by),
        }

    @classmethod
    def from_dict(cls, raw: Any, where: str) -> ConfusionTable:
        if not isinstance(raw, dict):
            raise DocumentError(f"{where}: must be an object")
        threshold = _get(raw, "threshold", (int, float), where)
        if not math.isfinite(threshold):
            raise DocumentError(f"{where}.threshold: must be a finite number")
        cells_raw = _get(raw, "cells", dict, where)
        if set(cells_raw) != set(CELLS):
            raise DocumentError(f"{where}.cells: must hold exactly {', '.join(CELLS)}")
        cells = {c: _count(cells_raw[c], f"{where}.cells.{c}") for c in CELLS}
        suppressed = _get(raw, "suppressed", list, where)
        if not all(isinstance(c, str) for c in suppressed):
            raise DocumentError(f"{where}.suppressed: must list cell names")
        if set(suppressed) != {c for c in CELLS if cells[c] is None} or len(suppressed) != len(set(suppressed)):
            raise DocumentError(f"{where}.suppressed: must list exactly the cells that are null")
        by = raw.get("suppressed_by", {})
        if (
            not isinstance(by, dict)
            or not set(by) <= set(suppressed)
            or not all(v in WITHHELD_RULES for v in by.values())
        ):
            raise DocumentError(f"{where}.suppressed_by: must map withheld cells to one of {', '.join(WITHHELD_RULES)}")
        return cls(float(threshold), cells, tuple(c for c in CELLS if c in suppressed), dict(by))


@dataclass(frozen=True)
class Release:
    study_id: str
    request_id: str
    bundle_sha256: str
    site_id: str
    created_at: str
    policy: dict[str, Any]
    flow: dict[str, Any]
    confusion: tuple[ConfusionTable, ...]
    site_key_id: str = ""
    signature: str = ""
    extra: dict[str, Any] = field(default_factory=dict)
    # analyses the site's disclosure control cut back so that the primary table survives, each
    # {"analysis", "action", "rule"} in words (never a count); absent from the JSON when empty
    cut_back: tuple[dict[str, str], ...] = ()

    def body(self) -> dict[str, Any]:
        out = self._body()
        if self.cut_back:
            out["cut_back"] = [dict(c) for c in self.cut_back]
        return out

    def _body(self) -> dict[str, Any]:
        return {
            "kind": "release",
            "version": VERSION,
            "study_id": self.study_id,
            "request_id": self.request_id,
            "bundle_sha256": self.bundle_sha256,
            "site_id": self.site_id,
            "site_key_id": self.site_key_id,
            "created_at": self.created_at,
            "policy": self.policy,
            "flow": self.flow,
            "results": {"confusion": [t.to_dict() for t in self.confusion], **self.extra},
        }

    def signed_bytes(self, private_key: Ed25519PrivateKey) -> bytes:
        body = {**self.body(), "site_key_id": key_id(private_key.public_key())}
        return json.dumps(_signed(body, private_key), indent=2, sort_keys=True).encode() + b"\n"

    @property
    def release_id(self) -> str:
        return sha256_hex(canonical_bytes({**self.body(), "signature": self.signature}))[:16]

    @classmethod
    def from_bytes(cls, data: bytes, source: str = "release") -> Release:
        """Parse and validate the structure. The signature is checked by the caller, who knows the site key."""
        doc = parse_json(data, source)
        _check_header(doc, "release", source)
        policy = _get(doc, "policy", dict, source)
        k = _get(policy, "min_cell_size", int, f"{source}.policy")
        if k < 1:
            raise DocumentError(f"{source}.policy.min_cell_size: must be at least 1")
        results = _get(doc, "results", dict, source)
        tables = _get(results, "confusion", list, f"{source}.results")
        flow = _get(doc, "flow", dict, source)
        _check_flow(flow, f"{source}.flow")
        return cls(
            study_id=_identifier(doc, "study_id", source),
            request_id=_identifier(doc, "request_id", source),
            bundle_sha256=_identifier(doc, "bundle_sha256", source, _HEX64),
            site_id=_identifier(doc, "site_id", source),
            created_at=_get(doc, "created_at", str, source)[:64],
            policy=policy,
            flow=flow,
            confusion=tuple(
                ConfusionTable.from_dict(t, f"{source}.results.confusion[{i}]") for i, t in enumerate(tables)
            ),
            site_key_id=_identifier(doc, "site_key_id", source, _KEY_ID),
            signature=_get(doc, "signature", str, source),
            extra={k: v for k, v in results.items() if k != "confusion"},
            cut_back=_cut_back(doc.get("cut_back", []), f"{source}.cut_back"),
        )

    def verify(self, trusted: KeyRing, source: str = "release") -> None:
        trusted.verify(self.site_key_id, canonical_bytes(self.body()), self.signature, source)


def _cut_back(raw: Any, where: str) -> tuple[dict[str, str], ...]:
    if not isinstance(raw, list) or len(raw) > 100:
        raise DocumentError(f"{where}: must be a list of at most 100 objects")
    out = []
    for i, item in enumerate(raw):
        if not isinstance(item, dict) or set(item) != {"analysis", "action", "rule"}:
            raise DocumentError(f"{where}[{i}]: must be an object with analysis, action and rule")
        if not all(isinstance(v, str) and len(v) <= 400 for v in item.values()):
            raise DocumentError(f"{where}[{i}]: analysis, action and rule must be short texts")
        out.append(dict(item))
    return tuple(out)


def _check_flow(flow: dict[str, Any], where: str) -> None:
    for name in ("read", "analysed", "analysed_positive", "analysed_negative"):
        _count(flow.get(name), f"{where}.{name}")
    excluded = flow.get("excluded", {})
    if not isinstance(excluded, dict):
        raise DocumentError(f"{where}.excluded: must be an object of counts by reason")
    for reason, value in excluded.items():
        _count(value, f"{where}.excluded.{str(reason)[:40]}")


def calibration_intercept(section: dict[str, Any], suffix: str = "") -> Any:
    """A release's calibration intercept (``suffix="_se"``: its standard error). Releases made before the key
    was named ``calibration_intercept`` called it ``citl``; both read the same."""
    return section.get(f"calibration_intercept{suffix}", section.get(f"citl{suffix}"))
