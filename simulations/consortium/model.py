"""The demo's frozen screening model (fitted on the development cohort) and the full-length scorecard."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression

from .schema import FEATURES, LONG_ITEMS, MODEL_FEATURES, OUTCOME, SEX_CATEGORIES, SUBTYPES

WEIGHT_DECIMALS = 6  # the frozen model's weights, as a paper would print them


def model_inputs(frame: pd.DataFrame) -> np.ndarray:
    """The model-input matrix of a schema-terms frame: float32, schema order, categories as their codes.

    A frame without ``subtype`` gets ``none`` (code 0): the model gives subtype a weight of zero.
    """
    columns = [frame[name].to_numpy(dtype=np.float64) for name in MODEL_FEATURES[:-1]]
    sex_code = frame["sex"].map({name: code for code, name in enumerate(SEX_CATEGORIES)})
    if sex_code.isna().any():
        raise ValueError(f"sex must be one of {', '.join(SEX_CATEGORIES)}")
    columns.append(sex_code.to_numpy(dtype=np.float64))
    subtype = frame["subtype"] if "subtype" in frame else pd.Series("none", index=frame.index)
    subtype_code = subtype.map({name: code for code, name in enumerate(SUBTYPES)})
    if subtype_code.isna().any():
        raise ValueError(f"subtype must be one of {', '.join(SUBTYPES)}")
    columns.append(subtype_code.to_numpy(dtype=np.float64))
    return np.column_stack(columns).astype(np.float32)


def _fit_model(frame: pd.DataFrame) -> LogisticRegression:
    """Fit on the twelve screening inputs, then add ``subtype`` as a thirteenth input with weight zero."""
    # The same weights on every machine: lbfgs on float32 inputs stops at a point that moves in the third decimal
    # with the CPU's BLAS kernels (and with it the small site's redraw and every table); Newton steps in float64
    # converge to where kernels differ only around the twelfth decimal, and the weights are frozen at six.
    fitted = LogisticRegression(solver="newton-cholesky", tol=1e-10, max_iter=100)
    inputs = model_inputs(frame)[:, : len(MODEL_FEATURES)].astype(np.float64)
    fitted.fit(inputs, frame[OUTCOME].to_numpy(dtype=int))
    model = LogisticRegression()
    model.classes_ = fitted.classes_
    model.coef_ = np.round(np.hstack([fitted.coef_, np.zeros((1, 1))]), WEIGHT_DECIMALS)
    model.intercept_ = np.round(fitted.intercept_, WEIGHT_DECIMALS)
    model.n_features_in_ = len(FEATURES)
    model.n_iter_ = fitted.n_iter_
    return model


def train_demo_model(development_csv: Path) -> LogisticRegression:
    """Fit the demo screening model on the development cohort (the schema's 13 inputs, subtype at weight 0)."""
    frame = pd.read_csv(development_csv, dtype={"sex": str})
    return _fit_model(frame)


def long_scorecard() -> bytes:
    """The full-length instrument's scoring rule as a points scorecard (docs/formats.md): one point per
    answer level over all twenty items; screen-positive at :data:`LONG_THRESHOLD` points or more."""
    points = {item: {str(level): level for level in range(4)} for item in LONG_ITEMS}
    return json.dumps({"format": "scorecard", "kind": "points", "intercept": 0, "points": points}).encode()
