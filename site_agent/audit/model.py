"""What the recipient knows about the model: a score band is a region of the features the model reads.

The recipient can evaluate the model for any input (docs/threat-model.md, section 0, item 2), so a condition
on a score and a condition on a feature the model reads are not independent: for a points scorecard whose
score is the age, "score 30 or more" *is* "age 30 or more". The audit accounts for it by replacing, in every
box, the conditions on the scores and on the features they read by one categorical *joint* variable per
group of such variables (:func:`joint_boxes`):

- **Groups.** A score variable is linked to each feature it reads that some released definition names, and
  to every other score variable that reads a feature it reads (two bundles, a paired comparison). A lone
  score whose features no definition names is a group too: the score bands its model cannot reach (a
  points total below the smallest attainable one) are known to be empty.
- **Scorecards: exact.** A scorecard's score is additive over features (points and weight × value; a
  logistic scorecard is a monotone function of that sum). The joint variable's values are the whole-number
  or category values of the group's features (every value of the schema's domain, which must be finite and
  discrete) times the score bands each score can reach from them: the points of the features no definition
  names add a *residual* whose attainable values are enumerated from the points table and the domains. A
  (feature values, score bands) combination no input reaches is no value at all, so the atoms it would make
  are empty, exactly as for the recipient. Combinations that lie in the same boxes are one value (they
  cannot be told apart). Cost: (product of the group's domain sizes) × (bands reached), at most
  :data:`MAX_COMBINATIONS`; then the refinement as before.
- **When the model cannot be followed exactly** (an ONNX graph, whose level sets the audit cannot compute,
  or a scorecard over a continuous feature that a definition names): the recipient's facts about empty
  combinations are a subset of "no analysed record, and no input the site tried, has this combination";
  with those combinations (``occupied``, computed by the site from its records and from random inputs over
  the schema's domains, :mod:`site_agent.occupancy`), every other combination is treated as known to be
  empty. This is sound (geometric emptiness implies no records) and more cautious than needed; the
  decision then looks at values in the sense of docs/threat-model.md R12. Without the records'
  combinations the audit refuses: it cannot show that the release is safe.

Score variables are named by the model's identity (``score@m:<id>``, :func:`model_id`), not by the bundle:
the same scorecard packed in two bundles (other thresholds, another name) is the same function.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from bisect import bisect_right
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .facts import ANALYSED, STATUS, AuditError

MAX_COMBINATIONS = 200_000  # joint values before merging, per group
MAX_RESIDUAL = 4_096  # attainable residual values (points of features no definition names) per score
JOINT = "score@joint:"  # prefix of a joint variable (scored: only analysed records have one)
_TOL = 1e-9

Box = tuple[tuple[str, Any], ...]
# occupied(group features, the scores' model descriptions) -> array [records, features + scores] of the analysed
# records' feature values (category codes) and scores, or None when the site cannot compute them
Occupied = Callable[[Sequence[str], Sequence[Mapping[str, Any]]], np.ndarray | None]


def model_id(description: Mapping[str, Any]) -> str:
    """A short hash of what the model computes (the same function gets the same id, whatever the bundle)."""
    canonical = json.dumps(description, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()[:16]


def describe_scorecard(kind: str, intercept: float, terms: Mapping[str, tuple[float, Mapping[str, float]]]) -> dict:
    """The ledger's description of a scorecard: ``terms[feature] = (weight, {value as text: points})`` for the
    features it reads (a category's weight multiplies its 0-based code, as in docs/formats.md)."""
    body = {
        "format": "scorecard",
        "kind": kind,
        "intercept": float(intercept),
        "terms": {
            name: {"weight": float(weight), "points": {str(k): float(v) for k, v in sorted(points.items())}}
            for name, (weight, points) in sorted(terms.items())
            if weight or points
        },
    }
    return {**body, "id": model_id(body)}


def describe_onnx(model_sha256: str, features: Sequence[str], bundle_sha256: str = "") -> dict:
    """The ledger's description of an ONNX model: its hash and the features it reads, in input order (and the
    bundle it came in, so that the site can find its kept copy; not part of the model's identity)."""
    body = {"format": "onnx", "model_sha256": model_sha256, "reads": list(features)}
    return {**body, "id": model_id(body), "bundle": bundle_sha256}


def describe_bundle(bundle: Any, scorer: Any) -> dict:
    """The description of a bundle's model (a :class:`federation.protocol.bundle.Bundle` and its scorer)."""
    features = bundle.schema.features
    if bundle.manifest.model_format == "onnx":
        return describe_onnx(bundle.manifest.model_sha256, [f.name for f in features], bundle.sha256)
    terms = {}
    for feature, table, weight in zip(features, scorer.lookups, scorer.weights, strict=True):
        points = {}
        for code, value in (table or {}).items():
            key = feature.categories[code] if feature.categories else str(code)
            points[key] = value
        if weight or points:
            terms[feature.name] = (float(weight), points)
    return describe_scorecard(scorer.kind, scorer.intercept, terms)


def meet_entries(old: Mapping[str, Any] | None, raw: Mapping[str, Any]) -> dict[str, Any]:
    """Two schema entries of one feature read together (the narrower range; the later entry's categories)."""
    new = dict(raw)
    if old is None:
        return new
    for key, pick in (("min", max), ("max", min)):
        if old.get(key) is not None and new.get(key) is not None:
            new[key] = pick(old[key], new[key])
        elif old.get(key) is not None:
            new[key] = old[key]
    if old.get("type") == "int":
        new["type"] = "int"
    return new


def models_for_old_entries(releases: Sequence[Any]) -> dict[int, dict[str, Mapping[str, Any]]]:
    """Models for releases recorded before the ledger described them: the bundle's model where a later release
    of the same bundle describes it (the comparison model of an old paired release stays its own variable),
    so that an old and a new release of one bundle share one score."""
    by_bundle: dict[str, Mapping[str, Any]] = {}
    for release in releases:
        if release.bundle and release.models.get("score"):
            by_bundle.setdefault(release.bundle, release.models["score"])
    return {
        r: {"score": by_bundle[release.bundle]}
        for r, release in enumerate(releases)
        if not release.models and release.bundle in by_bundle
    }


def reads(description: Mapping[str, Any]) -> frozenset[str]:
    if description.get("format") == "scorecard":
        return frozenset(description.get("terms", {}))
    return frozenset(description.get("reads", ()))


# --- value sets of one feature's contribution ----------------------------------------------------------------


def _values(domain: Any, name: str) -> list[Any] | None:
    """Every value an analysed record can have (category names, or whole numbers), or None when infinite or
    continuous. ``domain`` is the schema entry (``type``, ``min``, ``max``, ``categories``, ``missing``)."""
    if domain is None:
        return None
    categories = domain.get("categories")
    if categories:
        return list(categories)
    if domain.get("type") != "int" or domain.get("min") is None or domain.get("max") is None:
        return None
    low, high = math.ceil(float(domain["min"])), math.floor(float(domain["max"]))
    if high - low > 100_000:
        return None
    values: list[Any] = list(range(low, high + 1))
    missing = domain.get("missing")
    if isinstance(missing, (int, float)) and not isinstance(missing, bool) and missing not in values:
        values.append(missing)
    return values


def score_of(
    description: Mapping[str, Any], columns: Mapping[str, np.ndarray], domains: Mapping[str, Any]
) -> np.ndarray:
    """A scorecard's score of each record from its feature columns (category codes), as the site computes it."""
    terms = description["terms"]
    total = np.full(len(next(iter(columns.values()))), float(description.get("intercept", 0.0)))
    for name, term in terms.items():
        values = np.asarray(columns[name], dtype=np.float64)
        categories = (domains.get(name) or {}).get("categories")
        total = total + float(term.get("weight", 0.0)) * values
        for key, points in term.get("points", {}).items():
            code = categories.index(key) if categories else float(key)
            total = total + np.where(values == code, float(points), 0.0)
    return _link(description, total)


def _term(term: Mapping[str, Any], value: Any, categories: Sequence[str] | None) -> float:
    """A feature's points for one value: weight × value (a category's code) plus its table's points."""
    weight = float(term.get("weight", 0.0))
    points = term.get("points", {})
    if categories:
        return weight * categories.index(value) + float(points.get(str(value), 0.0))
    key = str(int(value)) if float(value).is_integer() else None
    return weight * float(value) + float(points.get(key, 0.0) if key is not None else 0.0)


def _residual(description: Mapping[str, Any], features: Sequence[str], domains: Mapping[str, Any]) -> np.ndarray | None:
    """Every sum the points of ``features`` can reach (sorted), or None when too many or not enumerable."""
    total = np.zeros(1)
    for name in features:
        domain = domains.get(name)
        values = _values(domain, name)
        if values is None:
            return None
        categories = domain.get("categories") if domain else None
        term = description["terms"][name]
        own = np.unique([_term(term, v, categories) for v in values])
        total = np.unique((total[:, None] + own[None, :]).ravel())
        if len(total) > MAX_RESIDUAL:
            return None
    return total


# --- joint variables --------------------------------------------------------------------------------------------


@dataclass
class Joint:
    """One group's joint variable: its name, its values (cell names), and which variables it replaced."""

    name: str
    cells: list[str]
    features: tuple[str, ...]
    scores: tuple[str, ...]
    exact: bool


def _groups(boxes: Sequence[Box], models: Mapping[str, Mapping[str, Any]]) -> list[tuple[set[str], set[str]]]:
    """(scores, named features) of each group that needs a joint variable (see the module docstring)."""
    named = {v for box in boxes for v, _ in box}
    scores = sorted(v for v in named if v in models)
    parent = {v: v for v in scores}

    def find(v: str) -> str:
        while parent[v] != v:
            parent[v] = parent[parent[v]]
            v = parent[v]
        return v

    def union(a: str, b: str) -> None:
        parent.setdefault(a, a)
        parent.setdefault(b, b)
        parent[find(a)] = find(b)

    for s in scores:
        for feature in reads(models[s]) & named:
            union(s, feature)
    for s, t in itertools.combinations(scores, 2):
        if reads(models[s]) & reads(models[t]):
            union(s, t)
    members: dict[str, set[str]] = {}
    for v in list(parent):
        members.setdefault(find(v), set()).add(v)
    out = []
    for group in members.values():
        group_scores = {v for v in group if v in models}
        group_features = group - group_scores
        if group_scores:  # a lone score too: the bands its model never reaches are known to be empty
            out.append((group_scores, group_features))
    return sorted(out, key=lambda g: sorted(g[0]))


def _score_cells(boxes: Sequence[Box], score: str) -> list[float]:
    return sorted({e for box in boxes for v, c in box if v == score for e in c if math.isfinite(e)})


def _hit(values: np.ndarray, edges: list[float]) -> list[set[int]]:
    """Per value, the score cells (between consecutive ``edges``) it lies in; a value within a rounding error
    of an edge (but not on it) counts on both sides, since the site's sum may round the other way."""
    out = []
    for v in values:
        index = bisect_right(edges, v)
        cells = {index}
        if index > 0 and 0 < v - edges[index - 1] <= _TOL * max(1.0, abs(edges[index - 1])):
            cells.add(index - 1)
        if index < len(edges) and 0 < edges[index] - v <= _TOL * max(1.0, abs(edges[index])):
            cells.add(index + 1)
        out.append(cells)
    return out


def _link(description: Mapping[str, Any], total: np.ndarray) -> np.ndarray:
    if description.get("kind") == "logistic":
        with np.errstate(over="ignore"):
            return 1.0 / (1.0 + np.exp(-total))
    return total


def _exact_combinations(
    boxes: Sequence[Box],
    scores: list[str],
    features: list[str],
    models: Mapping[str, Mapping[str, Any]],
    domains: Mapping[str, Any],
) -> tuple[list[str], list[list[Any]], np.ndarray, np.ndarray] | None:
    """Every (feature values, score cells) combination some input reaches, for a group of scorecards: the
    grid's features, their value lists, and per combination the value indices and the score cells; None when
    the group cannot be enumerated exactly."""
    if any(models[s].get("format") != "scorecard" for s in scores):
        return None
    grid_features = sorted(set(features) | _shared(scores, models))
    value_lists = []
    size = 1
    for name in grid_features:
        values = _values(domains.get(name), name)
        if values is None:
            return None
        value_lists.append(values)
        size *= len(values)
        if size > MAX_COMBINATIONS:
            return None
    grid = np.array(list(itertools.product(*(range(len(v)) for v in value_lists))), dtype=np.int64).reshape(
        size, len(grid_features)
    )
    hits: list[list[list[int]]] = []
    for s in scores:
        description = models[s]
        terms = description["terms"]
        residual = _residual(description, sorted(reads(description) - set(grid_features)), domains)
        if residual is None:
            return None
        partial = np.full(size, float(description.get("intercept", 0.0)))
        for j, name in enumerate(grid_features):
            if name in terms:
                categories = (domains.get(name) or {}).get("categories")
                own = np.array([_term(terms[name], v, categories) for v in value_lists[j]])
                partial = partial + own[grid[:, j]]
        edges = _score_cells(boxes, s)
        # every (grid point, residual value): the score, and the cells it lies in
        totals = _link(description, partial[:, None] + residual[None, :])
        per_point = []
        for row in totals:
            reached: set[int] = set()
            for cells in _hit(np.unique(row), edges):
                reached |= cells
            per_point.append(sorted(reached))
        hits.append(per_point)
    points: list[int] = []
    cells: list[tuple[int, ...]] = []
    for i in range(size):
        for combination in itertools.product(*(h[i] for h in hits)):
            points.append(i)
            cells.append(combination)
        if len(points) > MAX_COMBINATIONS:
            return None
    return grid_features, value_lists, grid[np.array(points, dtype=np.int64)], np.array(cells, dtype=np.int64)


def _observed_combinations(
    observed: np.ndarray, boxes: Sequence[Box], scores: list[str], features: list[str], domains: Mapping[str, Any]
) -> tuple[list[str], list[list[Any]], np.ndarray, np.ndarray]:
    """The combinations the records hold (the conservative treatment): value lists and indices as above."""
    observed = np.asarray(observed, dtype=np.float64).reshape(-1, len(features) + len(scores))
    value_lists: list[list[Any]] = []
    index_columns = []
    for j, name in enumerate(features):
        unique, inverse = np.unique(observed[:, j], return_inverse=True)
        categories = (domains.get(name) or {}).get("categories")
        value_lists.append([categories[int(v)] for v in unique] if categories else unique.tolist())
        index_columns.append(inverse.reshape(-1))
    cell_columns = [
        np.searchsorted(np.array(_score_cells(boxes, s), dtype=np.float64), observed[:, len(features) + i], "right")
        for i, s in enumerate(scores)
    ]
    n = len(observed)
    indices = np.column_stack(index_columns) if index_columns else np.zeros((n, 0), np.int64)
    cells = np.column_stack(cell_columns) if cell_columns else np.zeros((n, 0), np.int64)
    both = np.unique(np.hstack([indices, cells]).astype(np.int64), axis=0)
    return features, value_lists, both[:, : len(features)], both[:, len(features) :]


def _allowed(constraint: Any, values: Sequence[Any]) -> np.ndarray:
    if isinstance(constraint, frozenset):
        return np.array([str(v) in constraint for v in values], bool)
    low, high = constraint
    return np.array([low <= float(v) < high for v in values], bool)


def joint_boxes(
    boxes: Sequence[Box],
    models: Mapping[str, Mapping[str, Any]],
    domains: Mapping[str, Any],
    occupied: Occupied | None = None,
) -> tuple[list[Box], dict[str, list[str]], list[Joint]]:
    """``boxes`` with each treated group's conditions replaced by its joint variable (same order), the joint
    variables' values for :func:`~site_agent.audit.refinement.refine`, and a description of each group.

    ``models`` maps each qualified score variable to its model's description; ``domains`` maps features to
    their schema entries. Raises AuditError when a group can be neither enumerated nor given the records'
    combinations.
    """
    groups = _groups(boxes, models)
    if not groups:
        return list(boxes), {}, []
    out = [dict(box) for box in boxes]
    values: dict[str, list[str]] = {}
    joints: list[Joint] = []
    for number, (group_scores, group_features) in enumerate(groups):
        scores, features = sorted(group_scores), sorted(group_features)
        for box in out:
            if set(box) & set(features) and not box.get(STATUS, frozenset({"*"})) <= {ANALYSED}:
                raise AuditError("a count names a feature a model reads, for records that were not all analysed")
        exact = _exact_combinations(boxes, scores, features, models, domains)
        if exact is None:
            observed = occupied(features, [models[s] for s in scores]) if occupied is not None else None
            if observed is None and not features and len(scores) == 1:
                continue  # a lone score the site cannot score again: its own variable, as before (R10)
            if observed is None:
                raise AuditError(
                    "the audit cannot follow a model whose score is released together with a feature it reads "
                    "(an ONNX graph, or a scorecard over a continuous feature) without the records' combinations"
                )
            exact_or_observed = _observed_combinations(observed, boxes, scores, features, domains)
        else:
            exact_or_observed = exact
        grid_features, value_lists, indices, score_cells = exact_or_observed
        involved = set(scores) | set(grid_features)
        n = len(score_cells)
        member = np.zeros((len(out), n), bool)
        # each score's cells as [low, high) bounds, once per group (not once per box)
        bounds = {v: np.array([-math.inf, *_score_cells(boxes, v), math.inf]) for v in scores}
        for b, box in enumerate(out):
            own = {v: c for v, c in box.items() if v in involved}
            if not own:
                continue
            keep = np.ones(n, bool)
            for v, constraint in own.items():
                if v in scores:
                    edges = bounds[v]
                    inside = (constraint[0] <= edges[:-1]) & (edges[1:] <= constraint[1])
                    keep &= inside[score_cells[:, scores.index(v)]]
                else:
                    j = grid_features.index(v)
                    keep &= _allowed(constraint, value_lists[j])[indices[:, j]]
            member[b] = keep
        touched = np.flatnonzero(member.any(axis=1) | np.array([bool(set(box) & involved) for box in out]))
        # combinations in the same boxes are one value of the joint variable
        patterns, _ = _unique_rows(member[touched].T)
        name = f"{JOINT}{number}"
        values[name] = cell_names = [str(c) for c in range(len(patterns))]
        columns = np.asfortranarray(patterns)
        for position, b in enumerate(touched):
            box = out[b]
            for v in involved:
                box.pop(v, None)
            box[name] = frozenset(map(cell_names.__getitem__, np.flatnonzero(columns[:, position]).tolist()))
        joints.append(Joint(name, values[name], tuple(grid_features), tuple(scores), exact is not None))
    boxes_out = [tuple(sorted(box.items(), key=lambda item: item[0])) for box in out]
    return boxes_out, values, joints


def _unique_rows(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(rows, axis=0, return_inverse=True)`` for a boolean matrix, in the same order, on the rows
    packed into bytes (the lexicographic order of bit strings is that of their big-endian bytes)."""
    if rows.shape[0] == 0 or rows.shape[1] == 0:
        unique, inverse = np.unique(rows, axis=0, return_inverse=True)
        return unique, inverse.reshape(-1)
    packed = np.ascontiguousarray(np.packbits(rows, axis=1))
    keys = packed.view(np.dtype((np.void, packed.shape[1]))).reshape(-1)
    _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    return rows[first], inverse.reshape(-1)


def _shared(scores: Sequence[str], models: Mapping[str, Mapping[str, Any]]) -> set[str]:
    return {f for s, t in itertools.combinations(scores, 2) for f in reads(models[s]) & reads(models[t])}
