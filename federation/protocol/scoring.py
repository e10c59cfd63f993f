"""Running a frozen model: ONNX through onnxruntime, or a transparent JSON scorecard.

Both take the model-input matrix (float32, one column per schema feature, categories as 0-based codes)
and return one score per row. Only standard ONNX operator domains are accepted; no custom-op library is
ever registered, and the session runs single-threaded with graph optimisation limited to the basics.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from .bundle import Bundle
from .errors import BundleError
from .schema import Schema

ALLOWED_ONNX_DOMAINS = frozenset({"", "ai.onnx", "ai.onnx.ml"})


class Scorer(Protocol):
    def score(self, inputs: np.ndarray) -> np.ndarray: ...


def make_scorer(bundle: Bundle) -> Scorer:
    if bundle.manifest.model_format == "onnx":
        return OnnxScorer(bundle.model_bytes, len(bundle.schema.features))
    return Scorecard.from_json(bundle.model_bytes, bundle.schema)


class OnnxScorer:
    """Score with onnxruntime; the positive-class probability (column 1) is the score."""

    def __init__(self, model_bytes: bytes, n_features: int) -> None:
        import onnx
        import onnxruntime

        try:
            model = onnx.load_model_from_string(model_bytes)
        except Exception:  # onnx raises several types for malformed protobuf
            raise BundleError("model part is not a readable ONNX model") from None
        domains = {node.domain for node in model.graph.node}
        domains |= {op.domain for op in model.opset_import}
        unsupported = sorted(d for d in domains if d not in ALLOWED_ONNX_DOMAINS)
        if unsupported:
            raise BundleError(f"ONNX model uses unsupported operator domain {unsupported[0]!r}")
        options = onnxruntime.SessionOptions()
        options.intra_op_num_threads = 1
        options.inter_op_num_threads = 1
        options.graph_optimization_level = onnxruntime.GraphOptimizationLevel.ORT_ENABLE_BASIC
        try:
            self._session = onnxruntime.InferenceSession(
                model_bytes, sess_options=options, providers=["CPUExecutionProvider"]
            )
        except Exception:
            raise BundleError("onnxruntime cannot load the model (unsupported operator or graph)") from None
        inputs = self._session.get_inputs()
        if len(inputs) != 1:
            raise BundleError("ONNX model must have exactly one input (float32 [N, n_features])")
        self._input = inputs[0].name
        width = inputs[0].shape[-1] if inputs[0].shape else None
        if isinstance(width, int) and width != n_features:
            raise BundleError(f"ONNX model expects {width} inputs but the schema has {n_features}")
        outputs = [o.name for o in self._session.get_outputs()]
        self._output = "probabilities" if "probabilities" in outputs else outputs[min(1, len(outputs) - 1)]

    def score(self, inputs: np.ndarray) -> np.ndarray:
        if inputs.shape[0] == 0:
            return np.zeros(0)
        (out,) = self._session.run([self._output], {self._input: inputs.astype(np.float32, copy=False)})
        if isinstance(out, list):  # ZipMap output: list of {label: prob}
            out = np.array([[row.get(0, 0.0), row.get(1, 0.0)] for row in out])
        out = np.asarray(out, dtype=np.float64)
        if out.ndim != 2 or out.shape[1] < 2:
            raise BundleError("ONNX model output is not a [N, 2] probability table")
        return out[:, 1]


@dataclass(frozen=True)
class Scorecard:
    """A points or logistic scorecard (see docs/formats.md)."""

    kind: str
    intercept: float
    lookups: tuple[dict[int, float] | None, ...]  # per feature: code/int value -> points
    weights: np.ndarray

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
        return cls(kind, intercept, tuple(lookups), weight_vector)

    def score(self, inputs: np.ndarray) -> np.ndarray:
        x = inputs.astype(np.float64, copy=False)
        total = np.full(x.shape[0], self.intercept) + x @ self.weights
        for column, table in enumerate(self.lookups):
            if table is not None:
                total += _points(x[:, column], table)
        if self.kind == "logistic":
            return 1.0 / (1.0 + np.exp(-total))
        return total


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
