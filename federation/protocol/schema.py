"""The model's input schema: feature names, types, allowed ranges or categories, in model input order."""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass
from typing import Any

from .errors import DocumentError

FEATURE_TYPES = ("float", "int", "category")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")
MAX_FEATURES = 1000


@dataclass(frozen=True)
class Feature:
    name: str
    type: str
    minimum: float | None = None
    maximum: float | None = None
    categories: tuple[str, ...] = ()
    required: bool = True
    missing_value: float | str | None = None  # score a missing value as this instead of excluding

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "type": self.type, "required": self.required}
        if self.minimum is not None:
            out["min"] = self.minimum
        if self.maximum is not None:
            out["max"] = self.maximum
        if self.categories:
            out["categories"] = list(self.categories)
        if self.missing_value is not None:
            out["missing"] = self.missing_value
        return out


@dataclass(frozen=True)
class Schema:
    features: tuple[Feature, ...]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.features)

    def feature(self, name: str) -> Feature:
        for feature in self.features:
            if feature.name == name:
                return feature
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        return {"features": [f.to_dict() for f in self.features]}

    @classmethod
    def from_dict(cls, data: Any, source: str = "schema") -> Schema:
        if not isinstance(data, dict) or not isinstance(data.get("features"), list):
            raise DocumentError(f"{source}: needs a list of [[features]] tables")
        raw_features = data["features"]
        if not raw_features:
            raise DocumentError(f"{source}: [[features]] is empty; the model needs at least one input")
        if len(raw_features) > MAX_FEATURES:
            raise DocumentError(f"{source}: more than {MAX_FEATURES} features")
        features = [_parse_feature(item, f"{source}: features[{i}]") for i, item in enumerate(raw_features)]
        names = [f.name for f in features]
        if len(set(names)) != len(names):
            raise DocumentError(f"{source}: feature names must be unique")
        return cls(tuple(features))

    @classmethod
    def from_toml(cls, text: str, source: str) -> Schema:
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise DocumentError(f"{source}: not valid TOML ({exc})") from None
        return cls.from_dict(data, source)


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise DocumentError(f"{where}: must be a finite number")
    return float(value)


def _parse_feature(item: Any, where: str) -> Feature:
    if not isinstance(item, dict):
        raise DocumentError(f"{where}: must be a table")
    allowed = {"name", "type", "min", "max", "categories", "required", "missing"}
    unknown = sorted(set(item) - allowed)
    if unknown:
        raise DocumentError(f"{where}: unknown field {unknown[0]!r} (allowed: {', '.join(sorted(allowed))})")
    name = item.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise DocumentError(f"{where}.name: must be a name of letters, digits and _ (at most 64)")
    kind = item.get("type")
    if kind not in FEATURE_TYPES:
        raise DocumentError(f"{where}.type: must be one of {', '.join(FEATURE_TYPES)}")
    required = item.get("required", True)
    if not isinstance(required, bool):
        raise DocumentError(f"{where}.required: must be true or false")
    minimum = _number(item["min"], f"{where}.min") if "min" in item else None
    maximum = _number(item["max"], f"{where}.max") if "max" in item else None
    if minimum is not None and maximum is not None and minimum > maximum:
        raise DocumentError(f"{where}: min is larger than max")
    categories: tuple[str, ...] = ()
    if kind == "category":
        raw = item.get("categories")
        if not isinstance(raw, list) or not raw or not all(isinstance(c, str) for c in raw):
            raise DocumentError(f"{where}.categories: a category feature needs a list of category names")
        if len(set(raw)) != len(raw):
            raise DocumentError(f"{where}.categories: names must be unique")
        categories = tuple(raw)
        if minimum is not None or maximum is not None:
            raise DocumentError(f"{where}: a category feature takes no min/max")
    elif "categories" in item:
        raise DocumentError(f"{where}.categories: only a category feature has categories")
    missing = item.get("missing")
    if missing is not None:
        if kind == "category":
            if missing not in categories:
                raise DocumentError(f"{where}.missing: must be one of the categories")
        else:
            missing = _number(missing, f"{where}.missing")
            # a filled record is analysed with this value: it must be one the feature can take, or the site's
            # audit (which knows the domain) would take a band holding the filled records as empty
            if (minimum is not None and missing < minimum) or (maximum is not None and missing > maximum):
                raise DocumentError(f"{where}.missing: must lie within the feature's min and max")
            if kind == "int" and missing != int(missing):
                raise DocumentError(f"{where}.missing: an int feature's missing value must be a whole number")
    return Feature(name, kind, minimum, maximum, categories, required, missing)
