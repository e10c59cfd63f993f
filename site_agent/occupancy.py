"""The records' combinations of features and scores, for the audit of a model it cannot follow exactly.

An ONNX graph's level sets cannot be computed, so the audit assumes the recipient knows every combination of
(feature values, score bands) that no analysed record holds to be empty (:mod:`site_agent.audit.model`).
This module gives it those combinations: a second pass over the records, scoring them with the request's
models, and with an earlier release's model when the site kept its bundle (``SITEDIR/models/``) or the
ledger describes it (a scorecard). Random inputs over the schema's domains, scored the same way, are
witnesses too (a combination some input reaches is not known to be empty). Nothing here leaves the site;
the audit reads only which combinations occur, never how often.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from typing import Any

import numpy as np

from federation.protocol import ValidationToolError, load_bundle
from federation.protocol.errors import ScoringError

from .audit.model import score_of
from .checked_models import site_scorer
from .data import PreparedChunk


class _Collector:
    """An analysis that keeps the distinct rows (features, scores) of the analysed records."""

    name = "occupancy"

    def __init__(self, features: Sequence[str], scorers: Sequence[Any]) -> None:
        self.features = list(features)
        self.scorers = list(scorers)
        self.rows: list[np.ndarray] = []

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        columns = [np.asarray(chunk.columns[f], dtype=np.float64) for f in self.features]
        columns += [np.asarray(scorer(chunk, scores), dtype=np.float64) for scorer in self.scorers]
        if columns and len(chunk):
            self.rows.append(np.unique(np.column_stack(columns), axis=0))


def combinations(
    site: Any,
    source: Any,
    mapping: Any,
    bundle: Any,
    scorer: Any,
    pair: tuple[Any, Any] | None,
    chunk_rows: int,
    current: Mapping[str, Mapping[str, Any]],
    domains: Mapping[str, Any],
) -> Any:
    """The audit's ``occupied`` callback for this request (see :data:`site_agent.audit.model.Occupied`)."""

    def occupied(features: Sequence[str], models: Sequence[Mapping[str, Any]]) -> np.ndarray | None:
        from .analyses import Flow, tabulate
        from .data import exclusion_reasons

        ids = {name: model.get("id") for name, model in current.items()}
        scorers = []
        for model in models:
            if model.get("id") == ids.get("score"):
                scorers.append(lambda chunk, scores: scores)
            elif model.get("id") == ids.get("score.compare"):
                scorers.append(lambda chunk, scores: chunk.compare_scores)
            elif model.get("format") == "scorecard":
                if not set(model.get("terms", {})) <= set(domains):
                    return None
                scorers.append(lambda chunk, scores, m=model: score_of(m, chunk.columns, domains))
            else:
                kept = _kept_scorer(site, str(model.get("bundle", "")), domains)
                if kept is None:
                    return None
                scorers.append(kept)
        if not set(features) <= set(domains):
            return None
        collector = _Collector(features, scorers)
        tabulate(source, mapping, bundle, scorer, Flow(exclusion_reasons(mapping)), [collector], chunk_rows, pair)
        # Inputs of our own making are witnesses too: a combination some input reaches is not empty for the
        # recipient either, so it need not be assumed known to be empty (fewer facts, still a superset of
        # what the model tells). They are drawn without looking at the records.
        for block in _witnesses(bundle, pair, domains):
            try:
                collector.add(block, scorer.score(block.inputs))
            except ScoringError:
                break  # a model that fails outside the records' values: the records alone are the witnesses
        if not collector.rows:
            return np.zeros((0, len(features) + len(models)))
        return np.unique(np.concatenate(collector.rows), axis=0)

    return occupied


WITNESSES = 16_384  # random inputs per audit (four blocks)


def _witnesses(bundle: Any, pair: tuple[Any, Any] | None, domains: Mapping[str, Any]) -> Iterator[PreparedChunk]:
    """Blocks of random inputs over the schema's domains (whole numbers, categories, ranges), scored like
    records; a fixed seed, so that the same request gets the same witnesses."""
    rng = np.random.default_rng(20261202)
    rows = WITNESSES // 4
    for _ in range(4):
        columns = {}
        for name, entry in domains.items():
            categories = entry.get("categories")
            if categories:
                columns[name] = rng.integers(0, len(categories), rows).astype(np.float32)
                continue
            low = float(entry.get("min", 0.0) if entry.get("min") is not None else -1e6)
            high = float(entry.get("max", 1.0) if entry.get("max") is not None else 1e6)
            if entry.get("type") == "int":
                columns[name] = rng.integers(int(np.ceil(low)), int(np.floor(high)) + 1, rows).astype(np.float32)
            else:
                columns[name] = rng.uniform(low, high, rows).astype(np.float32)
        block = PreparedChunk(inputs=np.zeros((rows, 0), np.float32), outcome=np.zeros(rows, np.int8), read=0)
        block.columns = columns
        block.inputs = block.matrix(bundle.schema)
        if pair is not None:
            try:
                block.compare_scores = pair[1].score(block.matrix(pair[0].schema))
            except ScoringError:
                return
        yield block


def _kept_scorer(site: Any, bundle_sha256: str, domains: Mapping[str, Any]) -> Any:
    """Score with an earlier request's ONNX model from the site's kept copy (None when there is none, or
    when it reads a feature this request's records do not carry)."""
    if len(bundle_sha256) < 16:
        return None
    path = site.root / "models" / f"{bundle_sha256[:16]}.bundle"
    if not path.exists():
        return None
    try:
        bundle = load_bundle(path.read_bytes(), site.trusted, str(path))
        model = site_scorer(site, bundle)
    except ValidationToolError:
        return None
    if bundle.sha256 != bundle_sha256 or not set(bundle.schema.names) <= set(domains):
        return None
    return lambda chunk, scores: model.score(chunk.matrix(bundle.schema))
