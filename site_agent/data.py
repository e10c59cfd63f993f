"""Mapping local records to the schema and validating them, chunk by chunk (columnar, no per-record loop).

A record that breaks the schema is excluded and counted under exactly one reason (the first that applies,
in the order of ``EXCLUSION_REASONS``); the run goes on. A problem with the file or the mapping as a whole
(missing column, text in a numeric column, an outcome code the mapping does not list) stops the run with a
:class:`DataValidationError` naming the source, the column and the rule. No message carries a record's value.

Duplicates: when the mapping names an id column, the first record with a given id is kept (it may still be
excluded for another reason) and every later record with the same id is excluded as ``duplicate_id``. Ids
are remembered as 64-bit hashes (8 bytes each), so memory grows by 8 bytes per distinct id only when an id
column is mapped; two different ids share a hash with probability about n²/2⁶⁵.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field, replace

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from federation.protocol import DataValidationError, Feature, Schema

from .mapping import FeatureMap, Mapping, ReferenceMap
from .sources import DEFAULT_CHUNK_ROWS, arrow_text

EXCLUSION_REASONS = ("duplicate_id", "missing_outcome", "missing_feature", "out_of_range", "unknown_category")

__all__ = [
    "DEFAULT_CHUNK_ROWS",
    "EXCLUSION_REASONS",
    "IdTracker",
    "PreparedChunk",
    "exclusion_reasons",
    "prepare_chunk",
]


def exclusion_reasons(mapping: Mapping) -> tuple[str, ...]:
    """The reasons a run can exclude for: ``duplicate_id`` only when an id column is mapped."""
    return EXCLUSION_REASONS if mapping.id_column else tuple(r for r in EXCLUSION_REASONS if r != "duplicate_id")


@dataclass
class PreparedChunk:
    """The analysed records of one chunk, and how many records the chunk read and excluded (by reason)."""

    inputs: np.ndarray  # float32 [analysed, n_features] of the requested model, categories as 0-based codes
    outcome: np.ndarray  # int8 [analysed], 1 = condition present
    read: int
    excluded: Counter[str] = field(default_factory=Counter)
    columns: dict[str, np.ndarray] = field(default_factory=dict)  # every schema feature as the models see it
    reference2: np.ndarray | None = None  # int8: 1, 0, or -1 (missing); None when not mapped
    compare_scores: np.ndarray | None = None  # the comparison model's scores (paired requests)
    # records each feature flagged, by reason (a record may be flagged by several): the site's own messages
    # name the feature behind most exclusions; never released
    flagged: Counter[tuple[str, str]] = field(default_factory=Counter)

    def __len__(self) -> int:
        return len(self.outcome)

    def matrix(self, schema: Schema) -> np.ndarray:
        """The float32 model-input matrix for ``schema`` (a second model may use other features)."""
        if not schema.features:
            return np.zeros((len(self), 0), dtype=np.float32)
        return np.column_stack([self.columns[f.name] for f in schema.features]).astype(np.float32)

    @classmethod
    def concat(cls, chunks: list[PreparedChunk]) -> PreparedChunk:
        """One chunk holding the analysed records of ``chunks`` in order; reads and exclusions are summed."""
        if len(chunks) == 1:
            return chunks[0]
        excluded: Counter[str] = Counter()
        for chunk in chunks:
            excluded.update(chunk.excluded)
        first = chunks[0]
        return cls(
            inputs=np.concatenate([c.inputs for c in chunks]),
            outcome=np.concatenate([c.outcome for c in chunks]),
            read=sum(c.read for c in chunks),
            excluded=excluded,
            columns={name: np.concatenate([c.columns[name] for c in chunks]) for name in first.columns},
            reference2=None if first.reference2 is None else np.concatenate([c.reference2 for c in chunks]),
        )

    def split(self, rows: int) -> tuple[PreparedChunk, PreparedChunk]:
        """The first ``rows`` analysed records (carrying this chunk's reads and exclusions), and the rest.

        Both parts are views of this chunk's arrays (no copy)."""

        def part(piece: slice, read: int, excluded: Counter[str]) -> PreparedChunk:
            return PreparedChunk(
                inputs=self.inputs[piece],
                outcome=self.outcome[piece],
                read=read,
                excluded=excluded,
                columns={name: values[piece] for name, values in self.columns.items()},
                reference2=None if self.reference2 is None else self.reference2[piece],
                compare_scores=None if self.compare_scores is None else self.compare_scores[piece],
            )

        return part(slice(None, rows), self.read, self.excluded), part(slice(rows, None), 0, Counter())

    def subset(self, keep: np.ndarray) -> PreparedChunk:
        """The analysed records where ``keep`` is true (``read`` and exclusions are not carried over)."""
        return replace(
            self,
            inputs=self.inputs[keep],
            outcome=self.outcome[keep],
            read=0,
            excluded=Counter(),
            columns={name: values[keep] for name, values in self.columns.items()},
            reference2=None if self.reference2 is None else self.reference2[keep],
            compare_scores=None if self.compare_scores is None else self.compare_scores[keep],
        )


class IdTracker:
    """Remembers the ids seen so far (as sorted 64-bit hashes) to flag records that repeat one."""

    def __init__(self) -> None:
        self._seen = np.zeros(0, dtype=np.uint64)

    def repeats(self, column: pa.Array, missing: frozenset[str]) -> np.ndarray:
        """True for each record whose id was already seen in an earlier record; missing ids never repeat."""
        import pandas as pd  # only for its hash of text; a ClientApp whose schema has no id column skips the import

        text = arrow_text(column)
        present = _present(text, missing)
        keys = np.asarray(
            pd.util.hash_array(np.asarray(text.fill_null("").to_numpy(zero_copy_only=False), dtype=object))
        )
        index = np.flatnonzero(present)
        keys = keys[index]
        repeat = np.zeros(len(text), dtype=bool)
        if len(keys) == 0:
            return repeat
        order = np.argsort(keys, kind="stable")  # stable: the earliest record of a key comes first
        ordered = keys[order]
        later = np.zeros(len(keys), dtype=bool)
        later[order[1:][ordered[1:] == ordered[:-1]]] = True
        if len(self._seen):
            position = np.clip(np.searchsorted(self._seen, keys), 0, len(self._seen) - 1)
            later |= self._seen[position] == keys
        repeat[index] = later
        self._seen = np.union1d(self._seen, keys)
        return repeat


def _present(text: pa.Array, missing: frozenset[str]) -> np.ndarray:
    absent = pc.or_(pc.is_null(text), pc.is_in(text, value_set=pa.array(sorted(missing), type=pa.string())))
    return ~np.asarray(absent.fill_null(True).to_numpy(zero_copy_only=False), dtype=bool)


def _bools(array: pa.Array) -> np.ndarray:
    return np.asarray(array.fill_null(False).to_numpy(zero_copy_only=False), dtype=bool)


def prepare_chunk(
    batch: pa.RecordBatch | pa.Table,
    schema: Schema,
    mapping: Mapping,
    source: str,
    ids: IdTracker | None = None,
    primary: Schema | None = None,
) -> PreparedChunk:
    """Map and validate one chunk against ``schema``; ``inputs`` follow ``primary`` (default ``schema``).

    With two models (a paired comparison) ``schema`` holds the features of both, so a record is analysed
    only if every input of either model is valid, and both models see the same records.
    """
    n = batch.num_rows
    reasons = {reason: np.zeros(n, dtype=bool) for reason in EXCLUSION_REASONS}
    if mapping.id_column and ids is not None:
        reasons["duplicate_id"] = ids.repeats(batch.column(mapping.id_column), mapping.missing)
    outcome_map = ReferenceMap(mapping.outcome_column, mapping.positive, mapping.negative)
    outcome = _reference(
        batch.column(mapping.outcome_column), outcome_map, mapping.missing, source, "reference standard"
    )
    reasons["missing_outcome"] |= outcome < 0
    reference2 = None
    if mapping.reference2 is not None:
        reference2 = _reference(
            batch.column(mapping.reference2.column), mapping.reference2, mapping.missing, source, "second reference"
        )
    # What the models see, one column a feature; column-major so that each feature is written contiguously.
    matrix = np.empty((n, len(schema.features)), dtype=np.float32, order="F")
    flags = _Flags(reasons, Counter())
    for j, feature in enumerate(schema.features):
        fmap = mapping.features[feature.name]
        matrix[:, j] = _feature(batch.column(fmap.column), feature, fmap, mapping, source, flags)
    excluded = np.zeros(n, dtype=bool)
    counts: Counter[str] = Counter()
    for reason in EXCLUSION_REASONS:  # the first reason that applies wins
        hit = reasons[reason] & ~excluded
        counts[reason] += int(hit.sum())
        excluded |= hit
    keep = ~excluded
    kept = matrix[keep] if excluded.any() else matrix
    columns = {feature.name: kept[:, j] for j, feature in enumerate(schema.features)}
    model = primary or schema
    positions = [schema.names.index(name) for name in model.names]
    if positions == list(range(len(schema.features))):
        inputs = np.ascontiguousarray(kept)  # the scorer takes row-major input
    else:
        inputs = np.ascontiguousarray(kept[:, positions])
    return PreparedChunk(
        inputs=inputs,
        outcome=outcome[keep].astype(np.int8),
        read=n,
        excluded=counts,
        columns=columns,
        reference2=None if reference2 is None else reference2[keep],
        flagged=flags.flagged,
    )


def _reference(column: pa.Array, ref: ReferenceMap, missing: frozenset[str], source: str, what: str) -> np.ndarray:
    """1 (present), 0 (absent) or -1 (missing) per record; an unlisted value stops the run."""
    text = arrow_text(column)
    absent = ~_present(text, missing)
    positive = _bools(pc.is_in(text, value_set=pa.array(sorted(ref.positive), type=pa.string())))
    negative = _bools(pc.is_in(text, value_set=pa.array(sorted(ref.negative), type=pa.string())))
    if np.any(~(absent | positive | negative)):
        raise DataValidationError(
            f"{source}: column {ref.column!r} ({what}) holds values the mapping lists as neither positive nor "
            "negative; add them to the mapping's positive/negative lists or to missing"
        )
    result = np.where(positive, 1, 0).astype(np.int8)
    result[absent] = -1
    return result


@dataclass
class _Flags:
    """The chunk's exclusion masks, and how many records each feature flagged for each reason."""

    reasons: dict[str, np.ndarray]
    flagged: Counter[tuple[str, str]]

    def add(self, reason: str, feature: str, mask: np.ndarray) -> None:
        self.reasons[reason] |= mask
        self.flagged[(reason, feature)] += int(np.count_nonzero(mask))


def _feature(
    column: pa.Array,
    feature: Feature,
    fmap: FeatureMap,
    mapping: Mapping,
    source: str,
    flags: _Flags,
) -> np.ndarray:
    where = f"{source}: column {fmap.column!r} (feature {feature.name})"
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    if feature.type == "category":
        values, missing = _category(column, feature, fmap, mapping)
        flags.add("unknown_category", feature.name, ~missing & np.isnan(values))
    else:
        values, missing = _number(column, fmap, mapping, where)
        if fmap.multiply != 1.0:
            values = values * fmap.multiply
        flags.add("out_of_range", feature.name, ~missing & ~np.isfinite(values))
        # Whole numbers already when the column holds integers, with no unit conversion and no codes.
        whole = pa.types.is_integer(column.type) and fmap.multiply == 1.0 and not fmap.codes
        if feature.type == "int" and not whole:
            if fmap.multiply != 1.0:  # a unit conversion: round to the schema's whole unit
                values = np.round(values)
            with np.errstate(invalid="ignore"):
                flags.add("out_of_range", feature.name, ~missing & (np.abs(values - np.round(values)) > 1e-9))
        low = feature.minimum if feature.minimum is not None else -np.inf
        high = feature.maximum if feature.maximum is not None else np.inf
        with np.errstate(invalid="ignore"):
            flags.add("out_of_range", feature.name, ~missing & ((values < low) | (values > high)))
    if feature.missing_value is not None:  # the schema's missing-answer policy: score as a stated value
        fill = (
            float(feature.categories.index(feature.missing_value))
            if feature.type == "category"
            else float(feature.missing_value)
        )
        values = np.where(missing, fill, values)
    else:
        flags.add("missing_feature", feature.name, missing)
    bad = ~np.isfinite(values)  # excluded records: any finite value will do, the models never see them
    return np.where(bad, 0.0, values) if bad.any() else values


def _category(column: pa.Array, feature: Feature, fmap: FeatureMap, mapping: Mapping) -> tuple[np.ndarray, np.ndarray]:
    """0-based category codes (NaN = unknown) and the missing mask; local codes are applied first."""
    text = arrow_text(column)
    missing = ~_present(text, mapping.missing)
    keys = list(fmap.codes) + [c for c in feature.categories if c not in fmap.codes]
    targets = [fmap.codes.get(k, k) for k in keys]
    code_of = np.array([float(feature.categories.index(t)) for t in targets] + [np.nan])
    position = pc.index_in(text, value_set=pa.array(keys, type=pa.string())).fill_null(len(keys))
    values = code_of[np.asarray(position.to_numpy(zero_copy_only=False), dtype=np.int64)]
    values[missing] = np.nan
    return values, missing


def _number(column: pa.Array, fmap: FeatureMap, mapping: Mapping, where: str) -> tuple[np.ndarray, np.ndarray]:
    """Float64 values (NaN where missing) and the missing mask; text that is not a number stops the run."""
    kind = column.type
    numeric_missing = []
    for spelling in mapping.missing:
        try:
            numeric_missing.append(float(spelling))
        except ValueError:
            continue
    coded = np.zeros(len(column), dtype=bool)
    coded_values = np.zeros(len(column))
    if fmap.codes:
        text = arrow_text(column)
        keys = list(fmap.codes)
        position = pc.index_in(text, value_set=pa.array(keys, type=pa.string()))
        coded = _bools(pc.is_valid(position))
        targets = np.array([float(fmap.codes[k]) for k in keys] + [np.nan])
        coded_values = targets[np.asarray(position.fill_null(len(keys)).to_numpy(zero_copy_only=False), dtype=np.int64)]
    if pa.types.is_dictionary(kind):
        column = column.dictionary_decode()
        kind = column.type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        text = pc.utf8_trim_whitespace(column).cast(pa.string())
        missing = ~_present(text, mapping.missing) & ~coded  # an explicit code wins over a missing spelling
        blank = pa.array(missing | coded)
        try:
            parsed = pc.cast(pc.if_else(blank, pa.scalar(None, pa.string()), text), pa.float64())
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise DataValidationError(
                f"{where}: holds text that is not a number; map the codes in the mapping file or fix the data"
            ) from None
        values = np.asarray(parsed.to_numpy(zero_copy_only=False), dtype=np.float64)
    elif pa.types.is_null(kind):
        values = np.full(len(column), np.nan)
        missing = np.ones(len(column), dtype=bool)
    elif (
        pa.types.is_integer(kind)
        or pa.types.is_floating(kind)
        or pa.types.is_decimal(kind)
        or pa.types.is_boolean(kind)
    ):
        as_float = pc.cast(pc.cast(column, pa.int8()) if pa.types.is_boolean(kind) else column, pa.float64())
        values = np.asarray(as_float.to_numpy(zero_copy_only=False), dtype=np.float64)  # nulls become NaN
        missing = np.isnan(values)
        if numeric_missing:
            missing |= np.isin(values, numeric_missing)
        missing &= ~coded
    else:
        raise DataValidationError(f"{where}: holds {kind} values, not numbers")
    if fmap.codes:
        values = np.where(coded, coded_values, values)
    if missing.any():  # values may be a read-only view of the column here: replace, never write in place
        values = np.where(missing, np.nan, values)
    return values, missing
