"""The site's mapping file: local column names and codes → the model schema's (docs/formats.md).

Also :func:`suggest_mapping`, which proposes a mapping from the local column names and the values seen in
them, for a person to confirm (``site-agent map suggest``).
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import DocumentError, Feature, Schema

DEFAULT_MISSING = ("", "NA", ".")
_TOP_LEVEL = {"missing", "outcome", "features", "id", "reference2"}


@dataclass(frozen=True)
class FeatureMap:
    column: str
    codes: dict[str, str] = field(default_factory=dict)  # local text -> schema value (text)
    multiply: float = 1.0


@dataclass(frozen=True)
class ReferenceMap:
    """A reference-standard column and which local values mean condition present / absent."""

    column: str
    positive: frozenset[str]
    negative: frozenset[str]


@dataclass(frozen=True)
class Mapping:
    features: dict[str, FeatureMap]
    outcome_column: str
    positive: frozenset[str]
    negative: frozenset[str]
    missing: frozenset[str]
    source: str
    id_column: str | None = None  # when set, a record repeating an earlier record's id is excluded
    reference2: ReferenceMap | None = None  # a second reference standard, for the agreement analysis

    def columns_needed(self) -> list[str]:
        columns = {m.column for m in self.features.values()} | {self.outcome_column}
        if self.id_column:
            columns.add(self.id_column)
        if self.reference2:
            columns.add(self.reference2.column)
        return sorted(columns)


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


def _column(raw: dict[str, Any], default: str | None, where: str) -> str:
    column = raw.get("column", default)
    if not isinstance(column, str) or not column.strip():
        raise DocumentError(f"{where}.column must be a column name")
    return column.strip()


def _reference(raw: Any, default_column: str | None, where: str) -> ReferenceMap:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    unknown = sorted(set(raw) - {"column", "positive", "negative"})
    if unknown:
        raise DocumentError(f"{where}: unknown entry {unknown[0]!r} (allowed: column, positive, negative)")
    column = _column(raw, default_column, where)
    values = {}
    for name in ("positive", "negative"):
        listed = raw.get(name, ["1"] if name == "positive" else ["0"])
        if not isinstance(listed, list) or not listed:
            raise DocumentError(f"{where}.{name} must list the local values")
        values[name] = frozenset(_text(v, f"{where}.{name}") for v in listed)
    if values["positive"] & values["negative"]:
        raise DocumentError(f"{where}: a value cannot be both positive and negative")
    return ReferenceMap(column, values["positive"], values["negative"])


def load_mapping(path: Path, schema: Schema) -> Mapping:
    """Read and check a mapping file against ``schema`` (every model's features when two are compared)."""
    source = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DocumentError(f"{source}: mapping file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise DocumentError(f"{source}: not valid TOML ({exc})") from None
    unknown = sorted(set(doc) - _TOP_LEVEL)
    if unknown:
        raise DocumentError(
            f"{source}: unknown top-level entry {unknown[0]!r} (allowed: {', '.join(sorted(_TOP_LEVEL))})"
        )
    missing = doc.get("missing", list(DEFAULT_MISSING))
    if not isinstance(missing, list):
        raise DocumentError(f"{source}: missing must be a list of local spellings of a missing value")
    outcome = _reference(doc.get("outcome", {}), "outcome", f"{source}: [outcome]")
    reference2 = _reference(doc["reference2"], None, f"{source}: [reference2]") if "reference2" in doc else None
    id_column = None
    if "id" in doc:
        raw_id = doc["id"]
        if not isinstance(raw_id, dict) or set(raw_id) - {"column"}:
            raise DocumentError(f"{source}: [id] must be a table with one entry, column")
        id_column = _column(raw_id, None, f"{source}: [id]")
    raw_features = doc.get("features", {})
    if not isinstance(raw_features, dict):
        raise DocumentError(f"{source}: [features] must be tables named after schema features")
    for name in raw_features:
        if name not in schema.names:
            raise DocumentError(f"{source}: [features.{name}] is not a feature of the model's schema")
    features = {}
    for feature in schema.features:
        raw = raw_features.get(feature.name, {})
        features[feature.name] = _feature_map(raw, feature, f"{source}: [features.{feature.name}]")
    missing_values = frozenset(_text(v, f"{source}: missing") for v in missing)
    for name, reference in (("outcome", outcome), ("reference2", reference2)):
        if reference is not None and (reference.positive | reference.negative) & missing_values:
            # a value listed as missing would be read as missing, never as the code: say so instead of guessing
            raise DocumentError(
                f"{source}: [{name}]: a value listed under positive or negative is also listed under missing "
                "(the top-level list of local spellings of a missing value); keep it in one place"
            )
    return Mapping(
        features,
        outcome.column,
        outcome.positive,
        outcome.negative,
        missing_values,
        source,
        id_column,
        reference2,
    )


def _feature_map(raw: Any, feature: Feature, where: str) -> FeatureMap:
    if not isinstance(raw, dict):
        raise DocumentError(f"{where} must be a table")
    unknown = sorted(set(raw) - {"column", "codes", "multiply"})
    if unknown:
        raise DocumentError(f"{where}: unknown entry {unknown[0]!r} (allowed: column, codes, multiply)")
    column = _column(raw, feature.name, where)
    codes = raw.get("codes", {})
    if not isinstance(codes, dict):
        raise DocumentError(f"{where}.codes must be a table of local code = schema value")
    parsed = {str(k).strip(): _text(v, f"{where}.codes") for k, v in codes.items()}
    if len(parsed) < len(codes):  # "F" and "F " are one code once spaces are trimmed, as values are
        raise DocumentError(f"{where}.codes: two local codes are the same once leading and trailing spaces go")
    for target in parsed.values():
        if feature.type == "category" and target not in feature.categories:
            raise DocumentError(f"{where}.codes: {target!r} is not a category of the schema")
        if feature.type != "category":
            try:
                float(target)
            except ValueError:
                raise DocumentError(f"{where}.codes: a numeric feature's codes must map to numbers") from None
    multiply = raw.get("multiply", 1.0)
    if isinstance(multiply, bool) or not isinstance(multiply, (int, float)) or not math.isfinite(multiply):
        raise DocumentError(f"{where}.multiply must be a finite number")
    if multiply != 1.0 and feature.type == "category":
        raise DocumentError(f"{where}.multiply applies only to numeric features")
    return FeatureMap(column, parsed, float(multiply))


# --- suggestions --------------------------------------------------------------------------------------

_OUTCOME_WORDS = ("outcome", "dx", "diagnosis", "diagnosed", "case", "condition", "label", "target", "status")
_OUTCOME_WORDS += ("confirmed", "reference", "ref", "standard", "result", "final")
_ID_WORDS = ("id", "record", "participant", "subject", "patient")
_POSITIVE_WORDS = ("1", "yes", "y", "true", "t", "positive", "pos", "case", "present", "affected")
_NEGATIVE_WORDS = ("0", "no", "n", "false", "f", "negative", "neg", "control", "absent", "unaffected")
_MISSING_WORDS = ("", "na", "n/a", ".", "-", "null", "none", "missing", "?", "nan", "unknown")
_SYNONYMS = {"sex": ("sex", "gender"), "gender": ("gender", "sex")}
_UNITS = ("months", "month", "years", "year", "yrs", "yr", "mo", "m", "y", "in")
_UNMATCHED = "CHOOSE-A-COLUMN"


def _norm(name: str) -> str:
    return re.sub(r"[^a-z0-9]", "", name.lower())


def _tokens(name: str) -> list[str]:
    """Lower-case word tokens of a column name: ``age_in_months`` -> age, in, months; ``Q1`` -> q."""
    spaced = re.sub(r"([a-z])([A-Z])", r"\1 \2", name)
    return [t for t in re.split(r"[^a-z]+", spaced.lower()) if t]


def _number_suffix(name: str) -> int | None:
    match = re.match(r"^.*?(\d+)$", _norm(name))
    return int(match.group(1)) if match else None


def _toml_string(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _present_values(values: list[str]) -> list[str]:
    return [v for v in values if v.strip().lower() not in _MISSING_WORDS]


def suggest_mapping(values: dict[str, list[str]], schema: Schema) -> tuple[str, list[str]]:
    """Propose a mapping file from local column names and the distinct values seen in each column.

    ``values`` maps each local column name to its distinct values as text (a sample is enough). Returns the
    TOML text and notes for the person who must confirm it. Every guess is marked ``# CONFIRM``; a schema
    feature with no plausible column gets the placeholder column ``CHOOSE-A-COLUMN``, which the agent refuses
    until a person fills it in. Numeric codes of a category (``1``/``2`` for sex) are never guessed.
    """
    columns = list(values)
    used: set[str] = set()
    notes: list[str] = []
    lines = [
        f"# Mapping proposed by `site-agent map suggest` on {datetime.now(UTC).date().isoformat()}.",
        "# A person must check every line against the local data dictionary before the agent uses it.",
        "# Lines marked CONFIRM are guesses. This file stays at the site.",
        "",
    ]
    seen_missing = {v for vals in values.values() for v in vals if v.strip().lower() in _MISSING_WORDS}
    lines += [f"missing = [{', '.join(_toml_string(v) for v in sorted(seen_missing | set(DEFAULT_MISSING)))}]", ""]

    outcome = _outcome_column(values, schema)
    lines.append("[outcome]  # the reference standard")
    if outcome is None:
        notes.append("no column looks like the reference standard: fill in [outcome]")
        lines += [f"column = {_toml_string(_UNMATCHED)}  # CONFIRM: which column is the reference standard?"]
        lines += ['positive = ["1"]', 'negative = ["0"]', ""]
    else:
        used.add(outcome)
        observed = _present_values(values[outcome])
        positive = [v for v in observed if v.strip().lower() in _POSITIVE_WORDS]
        negative = [v for v in observed if v.strip().lower() in _NEGATIVE_WORDS]
        if not positive or not negative or set(observed) - set(positive) - set(negative):
            notes.append(f"reference standard {outcome!r}: say which local values mean present and absent")
        lines.append(f"column = {_toml_string(outcome)}  # CONFIRM")
        lines.append(f"positive = [{', '.join(_toml_string(v) for v in positive or ['1'])}]  # CONFIRM: present")
        lines.append(f"negative = [{', '.join(_toml_string(v) for v in negative or ['0'])}]  # CONFIRM: absent")
        lines.append("")

    id_column = next((c for c in columns if c not in used and set(_tokens(c)) & {"id"}), None) or next(
        (c for c in columns if c not in used and _norm(c) in _ID_WORDS), None
    )
    if id_column is not None:
        used.add(id_column)
        lines += ["[id]  # a record repeating an earlier record's id is excluded as a duplicate"]
        lines += [f"column = {_toml_string(id_column)}  # CONFIRM", ""]

    numbered: dict[int, list[str]] = {}
    for column in columns:
        number = _number_suffix(column)
        if number is not None and column not in used:
            numbered.setdefault(number, []).append(column)
    for feature in schema.features:
        column, note = _match_feature(feature, columns, numbered, used)
        lines.append(f"[features.{feature.name}]")
        if column is None:
            notes.append(f"no column found for feature {feature.name}: fill in its column")
            lines += [f"column = {_toml_string(_UNMATCHED)}  # CONFIRM: which column holds {feature.name}?", ""]
            continue
        used.add(column)
        lines.append(f"column = {_toml_string(column)}" + (f"  # CONFIRM: {note}" if note else ""))
        if feature.type != "category" and feature.name.endswith("_months") and _in_years(column, values[column]):
            lines.append("multiply = 12  # CONFIRM: the local column is in years, the model's input in months")
        if feature.type == "category":
            codes, code_note = _suggest_codes(feature, values[column])
            if codes:
                rendered = ", ".join(f"{_toml_string(k)} = {_toml_string(v)}" for k, v in codes.items())
                lines.append(f"codes = {{ {rendered} }}  # CONFIRM: {code_note}")
            elif code_note:
                lines.append(f"# {code_note}")
                notes.append(f"feature {feature.name}: {code_note}")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n", notes


def _outcome_column(values: dict[str, list[str]], schema: Schema) -> str | None:
    """The column named like a reference standard (most outcome words) with at most three values."""
    candidates = []
    for column, seen in values.items():
        words = set(_tokens(column)) | {_norm(column)}
        hits = len(words & set(_OUTCOME_WORDS))
        if hits and column not in schema.names and len(_present_values(seen)) <= 3:
            candidates.append((-hits, column))
    return min(candidates)[1] if candidates else None


def _in_years(column: str, observed: list[str]) -> bool:
    if re.search(r"(year|yrs|yr)", column.lower()):
        return True
    numbers = []
    for value in _present_values(observed):
        try:
            numbers.append(float(value))
        except ValueError:
            return False
    return bool(numbers) and max(numbers) <= 25 and any(n != int(n) for n in numbers)


def _match_feature(
    feature: Feature, columns: list[str], numbered: dict[int, list[str]], used: set[str]
) -> tuple[str | None, str]:
    free = [c for c in columns if c not in used]
    by_norm = {_norm(c): c for c in free}
    if _norm(feature.name) in by_norm:
        return by_norm[_norm(feature.name)], ""
    words = [t for t in _tokens(feature.name) if t not in _UNITS]
    unit = next((t for t in _tokens(feature.name) if t in _UNITS), None)
    for column in free:
        tokens = set(_tokens(column))
        if words and all(any(s in tokens for s in _SYNONYMS.get(w, (w,))) for w in words):
            return column, "matched by name"
    for column in free:
        norm = _norm(column)
        stem = "".join(words)
        if stem and norm.startswith(stem) and set(_tokens(norm[len(stem) :]) or [""]) <= set(_UNITS) | {""}:
            return column, "matched by name"
        if unit and norm in (unit, f"{stem}in{unit}"):
            return column, "matched by unit"
    number = _number_suffix(feature.name)
    if number is not None:
        candidates = [c for c in numbered.get(number, []) if c not in used]
        if len(candidates) == 1:
            return candidates[0], "matched by item number"
    return None, ""


def _suggest_codes(feature: Feature, observed: list[str]) -> tuple[dict[str, str], str]:
    present = _present_values(observed)
    unknown = [v for v in present if v not in feature.categories]
    if not unknown:
        return {}, ""
    codes: dict[str, str] = {}
    for value in unknown:
        folded = value.strip().lower()
        if not folded.isalpha():
            continue  # numeric codes are never guessed
        matches = [c for c in feature.categories if c.lower() == folded or c.lower().startswith(folded)]
        if len(matches) == 1:
            codes[value] = matches[0]
    rest = sorted(set(unknown) - set(codes))[:10]
    if not rest:
        return codes, "codes matched by their first letters"
    todo = f"local codes {', '.join(rest)} are not mapped: add them to codes, or leave them to be excluded"
    if codes:
        return codes, f"codes matched by their first letters; {todo}"
    return {}, todo + f', e.g. codes = {{ "LOCAL" = "{feature.categories[0]}" }}'
