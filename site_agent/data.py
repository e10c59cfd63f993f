"""Reading local records, mapping them to the schema and validating them, chunk by chunk.

A record that breaks the schema is excluded and counted under exactly one reason (the first that applies,
in the order of ``EXCLUSION_REASONS``); the run goes on. A problem with the file or the mapping as a whole
(missing column, text in a numeric column, an outcome code the mapping does not list) stops the run with a
:class:`DataValidationError` naming the file, the column and the rule. No message carries a record's value.
"""

from __future__ import annotations

import csv
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from federation.protocol import DataValidationError, Feature, Schema

from .mapping import FeatureMap, Mapping

EXCLUSION_REASONS = ("missing_outcome", "missing_feature", "out_of_range", "unknown_category")
DEFAULT_CHUNK_ROWS = 200_000


@dataclass
class PreparedChunk:
    inputs: np.ndarray  # float32 [analysed, n_features], categories as 0-based codes
    outcome: np.ndarray  # int8 [analysed], 1 = condition present
    read: int
    excluded: Counter[str] = field(default_factory=Counter)


def read_csv_chunks(path: Path, columns: list[str], chunk_rows: int = DEFAULT_CHUNK_ROWS) -> Iterator[pd.DataFrame]:
    """Yield frames of text cells holding ``columns``; raise DataValidationError for unusable files."""
    source = str(path)
    try:
        with open(path, "rb") as handle:
            head = handle.read(65536)
    except FileNotFoundError:
        raise DataValidationError(f"{source}: data file not found") from None
    except IsADirectoryError:
        raise DataValidationError(f"{source}: is a folder, not a data file") from None
    if not head.strip():
        raise DataValidationError(f"{source}: the file is empty")
    try:
        header_line = head.decode("utf-8-sig").splitlines()[0]
    except UnicodeDecodeError:
        raise DataValidationError(f"{source}: not UTF-8 text (re-export the file as UTF-8)") from None
    header = next(csv.reader([header_line]))
    if len(header) == 1 and any(sep in header_line for sep in (";", "\t", "|")):
        raise DataValidationError(f"{source}: the header has one column; the file must be comma-separated")
    missing = [c for c in columns if c not in header]
    if missing:
        raise DataValidationError(f"{source}: column {missing[0]!r} named in the mapping is not in the file's header")
    rows = 0
    try:
        reader = pd.read_csv(
            path,
            usecols=columns,
            dtype=str,
            keep_default_na=False,
            na_filter=False,
            chunksize=chunk_rows,
            encoding="utf-8-sig",
        )
        for frame in reader:
            rows += len(frame)
            yield frame
    except UnicodeDecodeError:
        raise DataValidationError(f"{source}: not UTF-8 text (re-export the file as UTF-8)") from None
    except pd.errors.ParserError:
        raise DataValidationError(f"{source}: malformed CSV (a row has more fields than the header)") from None
    if rows == 0:
        raise DataValidationError(f"{source}: the file has a header but no records")


def prepare_chunk(frame: pd.DataFrame, schema: Schema, mapping: Mapping, source: str) -> PreparedChunk:
    n = len(frame)
    reasons = {reason: np.zeros(n, dtype=bool) for reason in EXCLUSION_REASONS}
    outcome = _outcome(frame[mapping.outcome_column], mapping, source, reasons)
    columns = []
    for feature in schema.features:
        fmap = mapping.features[feature.name]
        columns.append(_feature(frame[fmap.column], feature, fmap, mapping, source, reasons))
    excluded = np.zeros(n, dtype=bool)
    counts: Counter[str] = Counter()
    for reason in EXCLUSION_REASONS:  # first reason that applies wins
        hit = reasons[reason] & ~excluded
        counts[reason] += int(hit.sum())
        excluded |= hit
    keep = ~excluded
    inputs = np.column_stack(columns).astype(np.float32)[keep] if columns else np.zeros((int(keep.sum()), 0))
    return PreparedChunk(inputs, outcome[keep].astype(np.int8), n, counts)


def _outcome(raw: pd.Series, mapping: Mapping, source: str, reasons: dict[str, np.ndarray]) -> np.ndarray:
    text = raw.str.strip()
    missing = text.isin(mapping.missing).to_numpy()
    positive = text.isin(mapping.positive).to_numpy()
    negative = text.isin(mapping.negative).to_numpy()
    if np.any(~(missing | positive | negative)):
        raise DataValidationError(
            f"{source}: column {mapping.outcome_column!r} (reference standard) holds values the mapping lists "
            "as neither positive nor negative; add them to [outcome] positive/negative or to missing"
        )
    reasons["missing_outcome"] |= missing
    return positive.astype(np.int8)


def _feature(
    raw: pd.Series,
    feature: Feature,
    fmap: FeatureMap,
    mapping: Mapping,
    source: str,
    reasons: dict[str, np.ndarray],
) -> np.ndarray:
    text = raw.str.strip()
    missing = text.isin(mapping.missing).to_numpy()
    if fmap.codes:
        text = text.map(fmap.codes).fillna(text)
    where = f"{source}: column {fmap.column!r} (feature {feature.name})"
    if feature.type == "category":
        lookup = {name: float(i) for i, name in enumerate(feature.categories)}
        values = text.map(lookup).to_numpy(dtype=np.float64)
        reasons["unknown_category"] |= ~missing & np.isnan(values)
    else:
        values = pd.to_numeric(text.where(~missing), errors="coerce").to_numpy(dtype=np.float64)
        if np.any(~missing & np.isnan(values)):
            raise DataValidationError(
                f"{where}: holds text that is not a number; map the codes in the mapping file or fix the data"
            )
        values = values * fmap.multiply
        reasons["out_of_range"] |= ~missing & ~np.isfinite(values)
        if feature.type == "int":
            if fmap.multiply != 1.0:  # a unit conversion: round to the schema's whole unit
                values = np.round(values)
            bad = ~missing & (np.abs(values - np.round(values)) > 1e-9)
            reasons["out_of_range"] |= bad
        low = feature.minimum if feature.minimum is not None else -np.inf
        high = feature.maximum if feature.maximum is not None else np.inf
        with np.errstate(invalid="ignore"):
            reasons["out_of_range"] |= ~missing & ((values < low) | (values > high))
    if feature.missing_value is not None:
        fill = (
            float(feature.categories.index(feature.missing_value))
            if feature.type == "category"
            else float(feature.missing_value)
        )
        values = np.where(missing, fill, values)
    else:
        reasons["missing_feature"] |= missing
    return np.nan_to_num(values, nan=0.0)
