"""The site's mapping file: local column names and codes → the model schema's (docs/formats.md)."""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from federation.protocol import DocumentError, Schema

DEFAULT_MISSING = ("", "NA", ".")


@dataclass(frozen=True)
class FeatureMap:
    column: str
    codes: dict[str, str] = field(default_factory=dict)  # local text -> schema value (text)
    multiply: float = 1.0


@dataclass(frozen=True)
class Mapping:
    features: dict[str, FeatureMap]
    outcome_column: str
    positive: frozenset[str]
    negative: frozenset[str]
    missing: frozenset[str]
    source: str

    def columns_needed(self) -> list[str]:
        return sorted({m.column for m in self.features.values()} | {self.outcome_column})


def default_mapping(schema: Schema) -> Mapping:
    """Columns named as the schema's features; the reference standard in `outcome`, 1 = present, 0 = absent."""
    return Mapping(
        {f.name: FeatureMap(f.name) for f in schema.features},
        "outcome",
        frozenset({"1"}),
        frozenset({"0"}),
        frozenset(DEFAULT_MISSING),
        "default mapping (columns named as the schema)",
    )


def _text(value: Any, where: str) -> str:
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise DocumentError(f"{where}: must be text or a whole number")
    return str(value).strip()


def load_mapping(path: Path, schema: Schema) -> Mapping:
    source = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DocumentError(f"{source}: mapping file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise DocumentError(f"{source}: not valid TOML ({exc})") from None
    unknown = sorted(set(doc) - {"missing", "outcome", "features"})
    if unknown:
        raise DocumentError(f"{source}: unknown top-level entry {unknown[0]!r}")
    missing = doc.get("missing", list(DEFAULT_MISSING))
    if not isinstance(missing, list):
        raise DocumentError(f"{source}: missing must be a list of local spellings of a missing value")
    outcome = doc.get("outcome", {})
    if not isinstance(outcome, dict):
        raise DocumentError(f"{source}: [outcome] must be a table")
    column = outcome.get("column", "outcome")
    if not isinstance(column, str) or not column:
        raise DocumentError(f"{source}: [outcome].column must be a column name")
    positive = outcome.get("positive", ["1"])
    negative = outcome.get("negative", ["0"])
    for name, values in (("positive", positive), ("negative", negative)):
        if not isinstance(values, list) or not values:
            raise DocumentError(f"{source}: [outcome].{name} must list the local values")
    pos = frozenset(_text(v, f"{source}: [outcome].positive") for v in positive)
    neg = frozenset(_text(v, f"{source}: [outcome].negative") for v in negative)
    if pos & neg:
        raise DocumentError(f"{source}: [outcome] a value cannot be both positive and negative")
    raw_features = doc.get("features", {})
    if not isinstance(raw_features, dict):
        raise DocumentError(f"{source}: [features] must be tables named after schema features")
    for name in raw_features:
        if name not in schema.names:
            raise DocumentError(f"{source}: [features.{name}] is not a feature of the model's schema")
    features = {}
    for feature in schema.features:
        raw = raw_features.get(feature.name, {})
        features[feature.name] = _feature_map(raw, feature.name, f"{source}: [features.{feature.name}]")
    return Mapping(
        features,
        column,
        pos,
        neg,
        frozenset(_text(v, f"{source}: missing") for v in missing),
        source,
    )


def _feature_map(raw: Any, default_column: str, where: str) -> FeatureMap:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    unknown = sorted(set(raw) - {"column", "codes", "multiply"})
    if unknown:
        raise DocumentError(f"{where}: unknown entry {unknown[0]!r} (allowed: column, codes, multiply)")
    column = raw.get("column", default_column)
    if not isinstance(column, str) or not column:
        raise DocumentError(f"{where}.column must be a column name")
    codes = raw.get("codes", {})
    if not isinstance(codes, dict):
        raise DocumentError(f"{where}.codes must be a table of local code = schema value")
    multiply = raw.get("multiply", 1.0)
    if isinstance(multiply, bool) or not isinstance(multiply, (int, float)) or not math.isfinite(multiply):
        raise DocumentError(f"{where}.multiply must be a finite number")
    return FeatureMap(
        column,
        {str(k).strip(): _text(v, f"{where}.codes") for k, v in codes.items()},
        float(multiply),
    )
