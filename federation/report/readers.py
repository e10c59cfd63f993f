"""Tolerant readers: find curves, regions, bins and intervals in analysis and release JSON.

The analysis JSON grows as methods are added, so the report does not hard-wire one layout for the newer
results. These readers accept the spellings a results object is likely to use (``fpr``/``tpr``,
``sensitivity``/``specificity``, point lists or parallel arrays) and return ``None`` when nothing fits;
the caller then shows the JSON as a table instead of a figure. Nothing here estimates anything.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from typing import Any

__all__ = [
    "calibration_bins",
    "find_keys",
    "get_path",
    "interval_paths",
    "number",
    "points",
    "roc_from_bands",
    "se_paths",
]

_X_KEYS = ("fpr", "false_positive_rate", "one_minus_specificity", "1-specificity", "x")
_Y_KEYS = ("tpr", "sensitivity", "true_positive_rate", "y")


def number(value: object) -> float | None:
    """A finite float, or None for anything else (null, text, booleans, NaN)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    result = float(value)
    return result if math.isfinite(result) else None


def get_path(data: Any, path: Sequence[str | int]) -> Any:
    """The value at ``path`` (dict keys and list indices), or None when any step is missing."""
    for step in path:
        if isinstance(data, dict) and isinstance(step, str):
            data = data.get(step)
        elif isinstance(data, list) and isinstance(step, int) and 0 <= step < len(data):
            data = data[step]
        else:
            return None
    return data


def find_keys(data: Any, wanted: str, max_depth: int = 4, path: tuple = ()) -> Iterator[tuple[tuple, Any]]:
    """Every ``(path, value)`` whose dict key contains ``wanted`` (case-insensitive), depth first."""
    if max_depth < 0 or not isinstance(data, dict):
        return
    for key, value in data.items():
        if wanted in str(key).lower():
            yield (*path, key), value
        yield from find_keys(value, wanted, max_depth - 1, (*path, key))


def _pick(entry: dict[str, Any], keys: Sequence[str]) -> tuple[str, Any] | None:
    for key in keys:
        if key in entry:
            return key, entry[key]
    return None


def points(value: Any) -> list[tuple[float, float]] | None:
    """(false-positive rate, sensitivity) pairs from a point list, a list of dicts or parallel arrays.

    A ``specificity`` coordinate is turned into ``1 − specificity``. Returns None unless there are at least
    two finite points.
    """
    pairs: list[tuple[float, float]] = []
    if isinstance(value, dict):
        for inner in ("points", "curve", "region", "ellipse"):
            if isinstance(value.get(inner), (list, dict)):
                return points(value[inner])
        x = _pick(value, (*_X_KEYS, "specificity"))
        y = _pick(value, _Y_KEYS)
        if x and y and isinstance(x[1], list) and isinstance(y[1], list) and len(x[1]) == len(y[1]):
            for a, b in zip(x[1], y[1], strict=True):
                xa, yb = number(a), number(b)
                if xa is not None and yb is not None:
                    pairs.append((1 - xa if x[0] == "specificity" else xa, yb))
    elif isinstance(value, list):
        for item in value:
            if isinstance(item, (list, tuple)) and len(item) == 2:
                xa, yb = number(item[0]), number(item[1])
            elif isinstance(item, dict):
                x, y = _pick(item, (*_X_KEYS, "specificity")), _pick(item, _Y_KEYS)
                if not x or not y:
                    return None
                xa, yb = number(x[1]), number(y[1])
                if xa is not None and x[0] == "specificity":
                    xa = 1 - xa
            else:
                return None
            if xa is not None and yb is not None:
                pairs.append((xa, yb))
    return pairs if len(pairs) >= 2 else None


_POSITIVE = ("positive", "positives", "n_positive", "with_condition", "diseased", "cases")
_NEGATIVE = ("negative", "negatives", "n_negative", "without_condition", "non_diseased", "controls")
_LOW_EDGE = ("low", "lower", "from", "start", "min", "score_low")


def _edge(entry: dict[str, Any], position: int) -> float:
    """Sort key of a band: its lower edge (null = unbounded below), or its position when it has no edge."""
    edge = _pick(entry, _LOW_EDGE)
    if edge is None:
        return float(position)
    value = number(edge[1])
    return -math.inf if value is None else value


def roc_from_bands(value: Any) -> list[tuple[float, float]] | None:
    """An empirical ROC from counts of participants with and without the condition per score band.

    Bands are ordered by their lower edge (or as listed, ascending); moving the threshold down one band at
    a time adds that band to the screen-positives. Returns None if a count is suppressed or missing.
    """
    bands = value
    if isinstance(value, dict):
        found = next((v for k, v in value.items() if "band" in str(k).lower() and isinstance(v, list)), None)
        bands = found
    if not isinstance(bands, list) or len(bands) < 2 or not all(isinstance(b, dict) for b in bands):
        return None
    rows = []
    for position, band in enumerate(bands):
        pos, neg = _pick(band, _POSITIVE), _pick(band, _NEGATIVE)
        if not pos or not neg or number(pos[1]) is None or number(neg[1]) is None:
            return None
        rows.append((_edge(band, position), float(pos[1]), float(neg[1])))
    rows.sort(key=lambda r: r[0], reverse=True)
    total_pos, total_neg = sum(r[1] for r in rows), sum(r[2] for r in rows)
    if total_pos <= 0 or total_neg <= 0:
        return None
    curve, tp, fp = [(0.0, 0.0)], 0.0, 0.0
    for _, pos_count, neg_count in rows:
        tp, fp = tp + pos_count, fp + neg_count
        curve.append((fp / total_neg, tp / total_pos))
    return curve


_COUNT = ("count", "n", "total", "participants")
_EVENTS = ("events", "observed", "positive", "with_condition")
_SUM_PREDICTED = ("sum_predicted", "predicted_sum", "sum_risk", "expected", "sum_predicted_risk")
_MEAN_PREDICTED = ("mean_predicted", "predicted", "mean_risk")


Bin = tuple[float | None, float | None, float | None, float]


def calibration_bins(value: Any) -> list[Bin] | None:
    """``(count, events, sum of predicted risk, lower edge)`` per risk bin; a withheld value is None.

    Each bin stands on its own (observed and predicted risk within it), so a withheld bin leaves the others
    usable. Returns None when the value holds no bins at all.
    """
    bins = value
    if isinstance(value, dict):
        bins = next(
            (
                v
                for k, v in value.items()
                if (str(k).lower() == "bands" or "bin" in str(k).lower()) and isinstance(v, list)
            ),
            None,
        )
    if not isinstance(bins, list) or not bins or not all(isinstance(b, dict) for b in bins):
        return None
    out: list[Bin] = []
    for position, entry in enumerate(bins):
        count, events = _pick(entry, _COUNT), _pick(entry, _EVENTS)
        total, mean = _pick(entry, _SUM_PREDICTED), _pick(entry, _MEAN_PREDICTED)
        n = number(count[1]) if count else None
        observed = number(events[1]) if events else None
        predicted_sum = None
        if total and number(total[1]) is not None:
            predicted_sum = number(total[1])
        elif mean and number(mean[1]) is not None and n is not None:
            predicted_sum = number(mean[1]) * n  # type: ignore[operator]
        out.append((n, observed, predicted_sum, _edge(entry, position)))
    return out


def interval_paths(entries: Sequence[dict[str, Any]], skip: Sequence[str], max_depth: int = 3) -> list[tuple]:
    """Paths (within site entries) holding an estimate with a confidence interval, in first-seen order."""
    found: dict[tuple, None] = {}

    def walk(value: Any, path: tuple, depth: int) -> None:
        if isinstance(value, dict):
            if {"estimate", "ci_low", "ci_high"} <= set(value):
                found.setdefault(path, None)
                return
            if depth >= max_depth:
                return
            for key, inner in value.items():
                if not path and key in skip:
                    continue
                walk(inner, (*path, key), depth + 1)

    for entry in entries:
        walk(entry, (), 0)
    return list(found)


def se_paths(entries: Sequence[Any], max_depth: int = 6) -> list[tuple]:
    """Paths to numbers reported with a standard error beside them (``NAME`` and ``NAME_se``), first seen first."""
    found: dict[tuple, None] = {}

    def walk(value: Any, path: tuple, depth: int) -> None:
        if depth > max_depth:
            return
        if isinstance(value, dict):
            for key, inner in value.items():
                if (
                    isinstance(key, str)
                    and not key.endswith("_se")
                    and number(inner) is not None
                    and number(value.get(f"{key}_se")) is not None
                ):
                    found.setdefault((*path, key), None)
                elif isinstance(inner, (dict, list)):
                    walk(inner, (*path, key), depth + 1)
        elif isinstance(value, list):
            for index, inner in enumerate(value):
                walk(inner, (*path, index), depth + 1)

    for entry in entries:
        walk(entry, (), 0)
    return list(found)
