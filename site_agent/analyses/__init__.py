"""Local analyses. Each accumulates over chunks, yields named counts (site_agent.counts) and renders the
JSON its part of a release carries, from what disclosure control lets through.

:func:`build_analyses` turns a request's analysis specs into analyses; :func:`tabulate` reads the source in
chunks, maps and validates each chunk, scores it with the model (and the comparison model of a paired
request) and feeds every analysis; :func:`collect_counts` gathers the named counts of all of them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

from federation.protocol import AnalysisSpec, Bundle, Schema, ValidationToolError, make_scorer

from ..banding import ScoreAxis
from ..counts import CountDef, CountSet
from ..data import IdTracker, PreparedChunk, prepare_chunk
from ..mapping import Mapping
from ..sources import DEFAULT_CHUNK_ROWS, SourceSpec, read_chunks
from .agreement import Agreement
from .base import CellPolicy, LocalAnalysis
from .calibration import DEFAULT_BIN_EDGES, Calibration
from .confusion import Confusion
from .flow import Flow
from .margin import DEFAULT_PROBABILITY_DISTANCES, Margin, margin_edges
from .paired import Paired
from .roc import DEFAULT_PROBABILITY_EDGES, Roc
from .subgroups import Subgroups, level_index

# Records are scored in blocks of exactly this many (the last block: the rest), whatever the read chunk
# size: onnxruntime's float32 result for a record can differ in the last bit with the batch it is in, and
# tables must not depend on how the source was chunked.
SCORE_BLOCK_ROWS = 65_536
ORDER = ("confusion", "roc", "calibration", "margin", "agreement", "paired", "subgroups")
INNER = ("confusion", "roc", "calibration", "margin")  # what subgroups repeat within each level


def build_analyses(
    specs: tuple[AnalysisSpec, ...], bundle: Bundle, compare: Bundle | None = None
) -> list[LocalAnalysis]:
    """The analyses a request asks for, in a stable order; thresholds default to the bundle's."""
    manifest = bundle.manifest
    probability = manifest.score_kind == "probability"
    by_name: dict[str, AnalysisSpec] = {}
    confusion_thresholds: list[float] = []
    for spec in specs:
        if spec.name == "confusion":  # several confusion specs add thresholds (first request version)
            confusion_thresholds.extend(spec.thresholds or manifest.thresholds)
        by_name.setdefault(spec.name, spec)

    def thresholds(name: str) -> tuple[float, ...]:
        spec = by_name.get(name)
        return tuple(spec.thresholds) if spec is not None and spec.thresholds else tuple(manifest.thresholds)

    def bands_of(name: str) -> tuple[float, ...]:
        spec = by_name.get(name)
        bands = tuple(spec.bands) if spec is not None else ()
        if name == "roc":
            return bands or (DEFAULT_PROBABILITY_EDGES if probability else tuple(manifest.thresholds))
        if name == "calibration":
            if not probability:
                raise ValidationToolError("request: calibration needs a model whose score is a probability")
            return bands or DEFAULT_BIN_EDGES
        if name == "margin" and not bands and not probability:
            raise ValidationToolError("request: margin needs distance bands for a points model")
        return bands or DEFAULT_PROBABILITY_DISTANCES

    subgroup_variables = _subgroup_variables(by_name.get("subgroups"), bundle)
    axis = None
    banded = [name for name in ("roc", "calibration", "margin") if name in by_name]
    if banded:
        edges: list[float] = []
        forced: list[float] = []
        for name in banded:
            if name == "margin":
                for threshold in thresholds("margin"):
                    edges.extend(margin_edges(threshold, bands_of("margin")))
            else:
                edges.extend(bands_of(name))
        if "confusion" in by_name or "subgroups" in by_name:
            forced.extend(confusion_thresholds or manifest.thresholds)
        for name in ("margin", "agreement"):
            if name in by_name:
                forced.extend(thresholds(name))
        if "paired" in by_name:
            paired = by_name["paired"]
            forced.append(paired.thresholds[0] if paired.thresholds else manifest.thresholds[0])
            edges.extend(paired_edges(bundle, bands_of("roc") if "roc" in by_name else ()))
        strata = [
            (feature.name, levels, lambda chunk, f=feature, e=cuts: level_index(f, e, chunk.columns[f.name]))
            for feature, cuts, levels in subgroup_variables
        ]
        axis = ScoreAxis(edges, forced, strata)

    def make(name: str, scope: str | None = None) -> LocalAnalysis:
        spec = by_name.get(name)
        if name == "confusion":
            return Confusion(tuple(confusion_thresholds) or tuple(manifest.thresholds))
        if name == "roc":
            return Roc(bands_of("roc"), axis, scope)
        if name == "calibration":
            return Calibration(bands_of("calibration"), axis, scope)
        if name == "margin":
            return Margin(thresholds("margin"), bands_of("margin"), axis, scope)
        if name == "agreement":
            return Agreement(thresholds("agreement"))
        if name == "paired":
            assert spec is not None
            if compare is None or compare.sha256 != spec.compare_bundle_sha256:
                raise ValidationToolError("request: the paired comparison needs the bundle the request names")
            own = spec.thresholds[0] if spec.thresholds else manifest.thresholds[0]
            other = spec.thresholds[1] if len(spec.thresholds) > 1 else compare.manifest.thresholds[0]
            roc_bands = tuple(by_name["roc"].bands) if "roc" in by_name else ()
            edges = paired_edges(bundle, roc_bands)
            compare_edges = paired_edges(
                compare, roc_bands if compare.manifest.score_kind == manifest.score_kind else ()
            )
            return Paired(own, other, compare.sha256, edges, compare_edges, axis)
        raise ValidationToolError(f"request: unknown analysis {name!r}")

    analyses = [make(name) for name in ORDER if name in by_name and name != "subgroups"]
    if "subgroups" in by_name:
        inner = [name for name in INNER if name in by_name] or ["confusion"]
        variables = [(feature, cuts) for feature, cuts, _ in subgroup_variables]
        analyses.append(Subgroups(variables, lambda scope: [make(name, scope) for name in inner]))
    return analyses


def paired_edges(bundle: Bundle, requested: tuple[float, ...] = ()) -> tuple[float, ...]:
    """Where the paired comparison's joint table cuts a model's score, before merging: the ROC bands the
    request names, else 0.05 steps for a probability, else for a points scorecard every whole number of its
    attainable range when that range has whole ends and spans at most 20 points, or 19 edges evenly across
    it (rounded up to whole numbers when the ends are whole), else the bundle's thresholds. Depends only on the
    request and the model, never on a record."""
    if requested:
        return tuple(requested)
    if bundle.manifest.score_kind == "probability":
        return DEFAULT_PROBABILITY_EDGES
    scorer = make_scorer(bundle) if bundle.manifest.model_format != "onnx" else None
    low, high = getattr(scorer, "low", -math.inf), getattr(scorer, "high", math.inf)
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        return tuple(bundle.manifest.thresholds)
    whole = float(low).is_integer() and float(high).is_integer()
    if whole and high - low <= 20:
        return tuple(float(e) for e in range(int(low) + 1, int(high) + 1))
    steps = [low + (high - low) * j / 20 for j in range(1, 20)]
    edges = sorted({float(math.ceil(e)) if whole else round(e, 6) for e in steps})
    return tuple(e for e in edges if low < e <= high)


def _subgroup_variables(spec: AnalysisSpec | None, bundle: Bundle) -> list[tuple[Any, tuple[float, ...], int]]:
    """(feature, edges, number of levels) for each variable a subgroups spec names, checked against the schema."""
    if spec is None:
        return []
    out = []
    for subgroup in spec.subgroups:
        if subgroup.variable not in bundle.schema.names:
            raise ValidationToolError(f"request: subgroup variable {subgroup.variable!r} is not a model input")
        feature = bundle.schema.feature(subgroup.variable)
        if feature.type == "category" and subgroup.edges:
            raise ValidationToolError(f"request: subgroup variable {feature.name!r} is a category; give no edges")
        if feature.type != "category" and not subgroup.edges:
            raise ValidationToolError(f"request: subgroup variable {feature.name!r} is numeric; give edges")
        levels = len(feature.categories) if feature.type == "category" else len(subgroup.edges) + 1
        out.append((feature, tuple(subgroup.edges), levels))
    return out


def combined_schema(first: Schema, second: Schema | None) -> Schema:
    """Every feature of both models (a paired request); a feature both use must be declared alike."""
    if second is None:
        return first
    features = list(first.features)
    for feature in second.features:
        if feature.name in first.names:
            if first.feature(feature.name) != feature:
                raise ValidationToolError(
                    f"bundles: the two models declare feature {feature.name!r} differently; they cannot be paired"
                )
        else:
            features.append(feature)
    return Schema(tuple(features))


def tabulate(
    source: SourceSpec,
    mapping: Mapping,
    bundle: Bundle,
    scorer: Any,
    flow: Flow,
    analyses: Sequence[LocalAnalysis],
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    compare: tuple[Bundle, Any] | None = None,
    progress: Callable[[int], None] | None = None,
) -> None:
    """Read ``source`` in chunks and feed every analysis; ``compare`` = (bundle, scorer) of a paired request.

    ``progress``, when given, is called with the number of records in each chunk read (a count only).
    """
    schema = combined_schema(bundle.schema, compare[0].schema if compare else None)
    ids = IdTracker() if mapping.id_column else None
    where = source.describe()

    def score(block: PreparedChunk) -> None:
        scores = scorer.score(block.inputs)
        if compare is not None:
            block.compare_scores = compare[1].score(block.matrix(compare[0].schema))
        flow.add(block, scores)
        for analysis in analyses:
            analysis.add(block, scores)

    pending: list[PreparedChunk] = []
    waiting = 0
    for batch in read_chunks(
        source, mapping.columns_needed(), chunk_rows, numeric_columns(mapping, schema), mapping.missing
    ):
        chunk = prepare_chunk(batch, schema, mapping, where, ids, primary=bundle.schema)
        if progress is not None:
            progress(batch.num_rows)
        # Blocks of SCORE_BLOCK_ROWS analysed records in order; only a block that spans two chunks is copied
        # (the others are views of their chunk).
        if waiting and waiting + len(chunk) >= SCORE_BLOCK_ROWS:
            head, chunk = chunk.split(SCORE_BLOCK_ROWS - waiting)
            score(PreparedChunk.concat([*pending, head]))
            pending, waiting = [], 0
        while len(chunk) >= SCORE_BLOCK_ROWS:
            block, chunk = chunk.split(SCORE_BLOCK_ROWS)
            score(block)
        pending.append(chunk)
        waiting += len(chunk)
    if pending:
        score(PreparedChunk.concat(pending))


def numeric_columns(mapping: Mapping, schema: Schema) -> frozenset[str]:
    """Columns that feed only numeric features without codes: a CSV reader may parse them as numbers."""
    plain = {
        m.column for name, m in mapping.features.items() if schema.feature(name).type != "category" and not m.codes
    }
    other = {m.column for name, m in mapping.features.items() if schema.feature(name).type == "category" or m.codes}
    other |= {mapping.outcome_column, mapping.id_column or "", mapping.reference2.column if mapping.reference2 else ""}
    return frozenset(plain - other)


def _definition_key(definition: CountDef) -> tuple[str, ...]:
    kept = [c for c in definition.where if not (c.numeric and c.low is None and c.high is None)]
    return tuple(sorted({repr((c.variable, c.values, c.low, c.high)) for c in kept}))


def link_equal_definitions(counts: CountSet) -> None:
    """State that counts defined alike are equal, so disclosure control shows all of them or none."""
    groups: dict[tuple[str, ...], list[str]] = {}
    for name, definition in counts.definitions.items():
        groups.setdefault(_definition_key(definition), []).append(name)
    for names in groups.values():
        first, *others = sorted(names)
        for other in others:
            counts.relate(first, other)


def collect_counts(flow: Flow, analyses: Sequence[LocalAnalysis], policy: CellPolicy) -> CountSet:
    """Every analysis's named counts in one set, with equal definitions linked."""
    counts = flow.counts(policy)
    for analysis in analyses:
        counts.merge(analysis.counts(policy))
    link_equal_definitions(counts)
    return counts


__all__ = [
    "Agreement",
    "Calibration",
    "CellPolicy",
    "Confusion",
    "Flow",
    "LocalAnalysis",
    "Margin",
    "Paired",
    "Roc",
    "Subgroups",
    "build_analyses",
    "collect_counts",
    "combined_schema",
    "link_equal_definitions",
    "tabulate",
]
