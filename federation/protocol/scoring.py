"""Running a frozen model: ONNX through onnxruntime, or a transparent JSON scorecard.

Both take the model-input matrix (float32, one column per schema feature, categories as 0-based codes)
and return one score per row. An ONNX graph passes the static check of :mod:`.model_check` (an operator
allowlist that proves each record's score depends on that record alone) when the scorer is made, before any
record is read; onnxruntime then runs only the part of the graph the score needs, single-threaded, with
graph optimisation limited to the basics, no custom-op library, and its own log silenced (its messages can
quote a tensor's values, which are a record's values).

A failure while scoring, or a score that is not a finite number in the model's range ([0, 1] for a
probability, the attainable range of a points scorecard), raises :class:`ScoringError` with one fixed message,
whatever the record: what went wrong for which record never leaves this module.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from .bundle import Bundle
from .errors import BundleError, ScoringError
from .model_check import ALLOWED_DOMAINS, CheckedGraph, check_onnx
from .schema import Schema

ALLOWED_ONNX_DOMAINS = ALLOWED_DOMAINS
SCORING_FAILED = (
    "scoring failed: the model did not give every record a finite score in its range; the whole request is "
    "refused (which record, and the runtime's message, are not shown: they can hold a record's values)"
)


class Scorer(Protocol):
    low: float
    high: float

    def score(self, inputs: np.ndarray) -> np.ndarray: ...


def make_scorer(bundle: Bundle) -> Scorer:
    """The bundle's model, checked statically (no record is read here)."""
    if bundle.manifest.model_format == "onnx":
        return OnnxScorer(bundle.model_bytes, len(bundle.schema.features))
    return Scorecard.from_json(bundle.model_bytes, bundle.schema)


def checked_scores(scores: np.ndarray, rows: int, low: float, high: float) -> np.ndarray:
    """``scores`` if it holds one finite number in [low, high] per row; else ScoringError (fixed message)."""
    if scores.shape != (rows,) or not np.isfinite(scores).all() or (scores < low).any() or (scores > high).any():
        raise ScoringError(SCORING_FAILED)
    return scores


class OnnxScorer:
    """Score with onnxruntime; the positive-class probability (column 1) is the score."""

    low, high = 0.0, 1.0

    def __init__(self, model_bytes: bytes, n_features: int, checked: CheckedGraph | None = None) -> None:
        """``checked``: the result of :func:`check_onnx` for exactly these bytes, made earlier (the site keeps
        it per model); without it the check runs here, before any record is read (BundleError)."""
        import onnxruntime

        if checked is None:
            checked = check_onnx(model_bytes, n_features)
        self.checked = checked
        self.operators = checked.operators
        options = onnxruntime.SessionOptions()
        options.intra_op_num_threads = 1
        options.inter_op_num_threads = 1
        options.graph_optimization_level = onnxruntime.GraphOptimizationLevel.ORT_ENABLE_BASIC
        options.log_severity_level = 4  # fatal only: a kernel's error message can print a tensor's values
        try:
            self._session = onnxruntime.InferenceSession(
                checked.model_bytes, sess_options=options, providers=["CPUExecutionProvider"]
            )
        except Exception:
            raise BundleError("onnxruntime cannot load the model (unsupported operator or graph)") from None
        self._input = self._session.get_inputs()[0].name
        self._output = checked.output
        self._run_options = onnxruntime.RunOptions()
        self._run_options.log_severity_level = 4

    def score(self, inputs: np.ndarray) -> np.ndarray:
        rows = inputs.shape[0]
        if rows == 0:
            return np.zeros(0)
        try:
            (out,) = self._session.run(
                [self._output], {self._input: inputs.astype(np.float32, copy=False)}, self._run_options
            )
            out = np.asarray(out, dtype=np.float64)
        except Exception:  # onnxruntime's message may quote record values: it is dropped here, whole
            raise ScoringError(SCORING_FAILED) from None
        if out.shape != (rows, 2):
            raise ScoringError(SCORING_FAILED)
        return checked_scores(out[:, 1], rows, self.low, self.high)


@dataclass(frozen=True)
class Scorecard:
    """A points or logistic scorecard (see docs/formats.md)."""

    kind: str
    intercept: float
    lookups: tuple[dict[int, float] | None, ...]  # per feature: code/int value -> points
    weights: np.ndarray
    low: float = -math.inf  # the attainable range of the score over the schema's domains
    high: float = math.inf

    @classmethod
    def from_json(cls, data: bytes, schema: Schema) -> Scorecard:
        try:
            doc = json.loads(data)
        except (json.JSONDecodeError, UnicodeDecodeError):
            raise BundleError("scorecard is not JSON") from None
        if not isinstance(doc, dict) or doc.get("format") != "scorecard":
            raise BundleError('scorecard must be a JSON object with "format": "scorecard"')
        kind = doc.get("kind")
        if kind not in ("points", "logistic"):
            raise BundleError('scorecard.kind must be "points" or "logistic"')
        intercept = _finite(doc.get("intercept", 0), "scorecard.intercept")
        points, weights = doc.get("points", {}), doc.get("weights", {})
        if not isinstance(points, dict) or not isinstance(weights, dict):
            raise BundleError("scorecard.points and scorecard.weights must be objects")
        for name in list(points) + list(weights):
            if name not in schema.names:
                raise BundleError(f"scorecard names feature {name!r}, which the schema lacks")
        lookups: list[dict[int, float] | None] = []
        for feature in schema.features:
            table = points.get(feature.name)
            if table is None:
                lookups.append(None)
                continue
            if not isinstance(table, dict):
                raise BundleError(f"scorecard.points.{feature.name} must be an object")
            lookups.append(_lookup(table, feature.name, feature.categories) or None)  # empty: 0 points for all
        weight_vector = np.array(
            [_finite(weights.get(f.name, 0), f"scorecard.weights.{f.name}") for f in schema.features]
        )
        low, high = _attainable(intercept, lookups, weight_vector, schema)
        if kind == "logistic":
            low, high = 0.0, 1.0
        return cls(kind, intercept, tuple(lookups), weight_vector, low, high)

    def score(self, inputs: np.ndarray) -> np.ndarray:
        x = inputs.astype(np.float64, copy=False)
        with np.errstate(over="ignore", invalid="ignore"):
            total = np.full(x.shape[0], self.intercept) + x @ self.weights
            for column, table in enumerate(self.lookups):
                if table is not None:
                    total += _points(x[:, column], table)
            if self.kind == "logistic":
                total = 1.0 / (1.0 + np.exp(-total))
        return checked_scores(total, x.shape[0], self.low, self.high)


def _attainable(
    intercept: float, lookups: list[dict[int, float] | None], weights: np.ndarray, schema: Schema
) -> tuple[float, float]:
    """Bounds of a points score over the schema's domains (a record outside them is excluded before scoring).

    Per feature, weight x value ranges over the feature's [min, max] (its codes for a category, its
    ``missing`` value included) and the points over the table's values and 0; the sum of the bounds contains
    every attainable score. A feature with a weight and no bound leaves that side open.
    """
    low = high = intercept
    for feature, table, weight in zip(schema.features, lookups, weights, strict=True):
        if feature.categories:
            lo_x, hi_x = 0.0, float(len(feature.categories) - 1)
        else:
            lo_x = -math.inf if feature.minimum is None else feature.minimum
            hi_x = math.inf if feature.maximum is None else feature.maximum
            if isinstance(feature.missing_value, (int, float)):
                lo_x, hi_x = min(lo_x, feature.missing_value), max(hi_x, feature.missing_value)
        if weight:
            ends = [weight * lo_x, weight * hi_x]
            low, high = low + min(ends), high + max(ends)
        if table:
            low, high = low + min(0.0, *table.values()), high + max(0.0, *table.values())
    return low, high


def _points(values: np.ndarray, table: dict[int, float]) -> np.ndarray:
    """Points for each value; a value absent from the table scores 0."""
    keys = np.array(sorted(table), dtype=np.float64)
    points = np.array([table[int(k)] for k in keys])
    position = np.clip(np.searchsorted(keys, values), 0, len(keys) - 1)
    return np.where(keys[position] == values, points[position], 0.0)


def _finite(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise BundleError(f"{where} must be a finite number")
    return float(value)


def _lookup(table: dict[str, Any], name: str, categories: tuple[str, ...]) -> dict[int, float]:
    out: dict[int, float] = {}
    for key, value in table.items():
        if categories:
            if key not in categories:
                raise BundleError(f"scorecard.points.{name}: {key!r} is not a category of the schema")
            code = categories.index(key)
        else:
            try:
                code = int(key)
            except ValueError:
                raise BundleError(f"scorecard.points.{name}: key {key!r} is not an integer value") from None
            if abs(code) > 2**53:  # model inputs are float: a larger key could never match (and breaks lookup)
                raise BundleError(f"scorecard.points.{name}: key {key[:40]!r} is out of range (at most 2**53)")
        out[code] = _finite(value, f"scorecard.points.{name}.{key}")
    return out
