"""The figures' data readers against scikit-learn on its bundled breast-cancer data, and the plots' SVG."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import confusion_matrix, roc_auc_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from federation.report.plots import (
    CalibrationSeries,
    ForestRow,
    ForestSummary,
    RocSeries,
    SrocInputs,
    calibration_plot,
    forest_plot,
    roc_plot,
    sroc_plot,
)
from federation.report.readers import calibration_bins, points, roc_from_bands

from .dom import parse

EDGES = np.linspace(0.1, 0.9, 9)  # nine edges: ten risk bands of width 0.1


@pytest.fixture(scope="module")
def scored() -> tuple[np.ndarray, np.ndarray]:
    """Predicted risk of the positive class (benign = 1 in scikit-learn's coding) on held-out records."""
    data = load_breast_cancer()
    x, y = data.data, data.target
    order = np.random.default_rng(0).permutation(len(y))
    train, test = order[:300], order[300:]
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=1000)).fit(x[train], y[train])
    return y[test], model.predict_proba(x[test])[:, 1]


def _bands(y: np.ndarray, risk: np.ndarray) -> list[dict[str, object]]:
    """Counts per band in the shape a release carries (site_agent/analyses/roc.py): low, high, positive, negative."""
    index = np.searchsorted(EDGES, risk, side="right")
    lows = [None, *EDGES.tolist()]
    highs = [*EDGES.tolist(), None]
    return [
        {
            "low": lows[j],
            "high": highs[j],
            "positive": int(((index == j) & (y == 1)).sum()),
            "negative": int(((index == j) & (y == 0)).sum()),
        }
        for j in range(len(EDGES) + 1)
    ]


def test_roc_from_bands_matches_scikit_learn(scored: tuple[np.ndarray, np.ndarray]) -> None:
    y, risk = scored
    curve = roc_from_bands({"bands": _bands(y, risk)})
    assert curve is not None and curve[0] == (0.0, 0.0) and curve[-1] == pytest.approx((1.0, 1.0))
    # Each interior point is the operating point "positive when risk >= edge" (scikit-learn's confusion_matrix).
    for edge, (fpr, tpr) in zip(EDGES[::-1], curve[1:-1], strict=True):
        tn, fp, fn, tp = confusion_matrix(y, risk >= edge, labels=[0, 1]).ravel()
        assert fpr == pytest.approx(fp / (fp + tn)) and tpr == pytest.approx(tp / (tp + fn))
    # The trapezoid area under the banded curve is the Mann-Whitney AUC of the banded score (ties count 1/2).
    fpr, tpr = np.array(curve).T
    banded = np.searchsorted(EDGES, risk, side="right")
    assert np.trapezoid(tpr, fpr) == pytest.approx(roc_auc_score(y, banded), abs=1e-12)


def test_roc_from_bands_refuses_a_suppressed_band(scored: tuple[np.ndarray, np.ndarray]) -> None:
    bands = _bands(*scored)
    bands[3]["positive"] = None
    assert roc_from_bands({"bands": bands}) is None


def test_calibration_bins_match_scikit_learn(scored: tuple[np.ndarray, np.ndarray]) -> None:
    y, risk = scored
    index = np.searchsorted(EDGES, risk, side="right")
    bins = [
        {
            "low": None if j == 0 else EDGES[j - 1],
            "n": int((index == j).sum()),
            "events": int(y[index == j].sum()),
            "sum_predicted_risk": float(risk[index == j].sum()),
        }
        for j in range(len(EDGES) + 1)
    ]
    read = calibration_bins({"bins": bins})
    assert read is not None
    used = [b for b in read if b[0]]
    observed = [b[1] / b[0] for b in used]
    predicted = [b[2] / b[0] for b in used]
    # scikit-learn's uniform strategy cuts [0, 1] into the same ten bands and drops empty ones.
    prob_true, prob_pred = calibration_curve(y, risk, n_bins=10, strategy="uniform")
    np.testing.assert_allclose(observed, prob_true, rtol=1e-12)
    np.testing.assert_allclose(predicted, prob_pred, rtol=1e-12)


def test_points_reads_the_usual_spellings() -> None:
    expected = [(0.1, 0.5), (0.3, 0.8)]
    assert points([[0.1, 0.5], [0.3, 0.8]]) == expected
    assert points([{"fpr": 0.1, "tpr": 0.5}, {"fpr": 0.3, "tpr": 0.8}]) == expected
    from_specificity = points({"specificity": [0.9, 0.7], "sensitivity": [0.5, 0.8]})
    assert from_specificity is not None
    np.testing.assert_allclose(from_specificity, expected)
    assert points({"curve": {"fpr": [0.1, 0.3], "sensitivity": [0.5, 0.8]}}) == expected
    assert points([[0.1, None]]) is None and points("text") is None


def _paths(svg: str) -> int:
    return sum(1 for n in parse(svg).iter("path") if n.attrs.get("d"))


def test_every_plot_draws_an_svg(scored: tuple[np.ndarray, np.ndarray]) -> None:
    y, risk = scored
    rows = [ForestRow("a", 0.7, 0.6, 0.8, 100, "70%"), ForestRow("b", None, None, None, None, "suppressed", False)]
    summary = ForestSummary("Pooled", 0.7, 0.65, 0.75, 0.5, 0.85, "70%")
    curve = roc_from_bands({"bands": _bands(y, risk)})
    assert curve is not None
    svgs = [
        forest_plot("t", "x", rows, summary, salt="a"),
        forest_plot("t", "x", rows, None, salt="b", no_summary_reason="one site"),
        sroc_plot(
            SrocInputs(
                ["a", "b"],
                [0.1, 0.2],
                [0.8, 0.7],
                [100, 50],
                (0.15, 0.75),
                [(0.1, 0.7), (0.2, 0.8), (0.15, 0.9)],
                [(0.0, 0.5), (0.4, 0.95), (0.2, 0.99)],
                [(0.0, 0.0), (0.15, 0.75), (1.0, 1.0)],
            ),
            "t",
            salt="c",
        ),
        roc_plot([RocSeries("site", [p[0] for p in curve], [p[1] for p in curve])], "t", salt="d"),
        calibration_plot([CalibrationSeries("site", [0.1, 0.5, 0.9], [0.12, 0.45, 0.93], [10, 20, 30])], "t", "e"),
    ]
    for svg in svgs:
        assert svg.startswith("<svg") and _paths(svg) >= 5
    assert "one site" in svgs[1] and "95% prediction interval" in svgs[0]
    assert forest_plot("t", "x", rows, summary, salt="a") == svgs[0]  # reproducible byte for byte
