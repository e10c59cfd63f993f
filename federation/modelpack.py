"""Packing frozen models into signed bundles (coordinator side)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol import BundleError, Schema, load_bundle, pack_bundle
from federation.protocol.errors import ScoringError
from federation.protocol.keys import KeyRing, key_id
from federation.protocol.scoring import Scorecard, make_scorer


def onnx_from_sklearn(classifier: Any, n_features: int) -> bytes:
    """Convert a fitted scikit-learn binary classifier to ONNX (float32 input, `probabilities` output)."""
    from skl2onnx import to_onnx
    from skl2onnx.common.data_types import FloatTensorType

    model = to_onnx(
        classifier,
        initial_types=[("input", FloatTensorType([None, n_features]))],
        options={id(classifier): {"zipmap": False}},
        target_opset={"": 17, "ai.onnx.ml": 3},
    )
    return model.SerializeToString()


def bundle_from_sklearn(
    classifier: Any,
    schema: Schema,
    private_key: Ed25519PrivateKey,
    threshold: float = 0.5,
    name: str = "model",
) -> bytes:
    """A signed bundle for a fitted scikit-learn classifier via skl2onnx."""
    return pack_model(
        onnx_from_sklearn(classifier, len(schema.features)), "onnx", schema, private_key, [threshold], name
    )


def pack_model(
    model_bytes: bytes,
    model_format: str,
    schema: Schema,
    private_key: Ed25519PrivateKey,
    thresholds: list[float] | None,
    name: str = "model",
) -> bytes:
    """Pack, sign, and prove the bundle loads and scores a row before anyone receives it."""
    if model_format == "scorecard":
        try:
            kind = json.loads(model_bytes).get("kind")
        except (ValueError, AttributeError):
            raise BundleError("scorecard is not a JSON object") from None
        Scorecard.from_json(model_bytes, schema)
        score_kind = "probability" if kind == "logistic" else "points"
    else:
        score_kind = "probability"
    if thresholds is None:
        if score_kind == "points":
            raise BundleError("a points scorecard needs --threshold")
        thresholds = [0.5]
    data = pack_bundle(
        model_bytes=model_bytes,
        model_format=model_format,
        schema=schema,
        score_kind=score_kind,
        thresholds=thresholds,
        private_key=private_key,
        name=name,
    )
    public = private_key.public_key()
    bundle = load_bundle(data, KeyRing({key_id(public): public}))
    scorer = make_scorer(bundle)  # the sites' static check, run here first
    # One record inside the schema's domains (0, moved into [min, max]; category code 0).
    probe = [0.0 if f.categories else _inside(0.0, f.minimum, f.maximum) for f in schema.features]
    try:
        scores = scorer.score(np.array([probe], dtype=np.float32))
    except ScoringError:
        raise BundleError(
            "the packed model does not return a finite score in its range for a record inside the schema"
        ) from None
    if scores.shape != (1,):
        raise BundleError("the packed model does not return one finite score per row")
    return data


def model_format_for(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix == ".onnx":
        return "onnx"
    if suffix == ".json":
        return "scorecard"
    raise BundleError(f"{path}: model must be .onnx (ONNX) or .json (scorecard)")


def _inside(value: float, low: float | None, high: float | None) -> float:
    """``value`` moved into [low, high] (an open side does not move it)."""
    if low is not None:
        value = max(value, low)
    if high is not None:
        value = min(value, high)
    return value
