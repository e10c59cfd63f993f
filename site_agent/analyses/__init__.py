"""Local analyses. Each accumulates over chunks, yields named counts (site_agent.counts) and renders the
JSON its part of a release carries, from what disclosure control lets through."""

from __future__ import annotations

from federation.protocol import AnalysisSpec, Bundle

from .base import LocalAnalysis
from .confusion import Confusion
from .flow import Flow


def build_analyses(specs: tuple[AnalysisSpec, ...], bundle: Bundle) -> list[LocalAnalysis]:
    """The analyses a request asks for, in a stable order; thresholds default to the bundle's."""
    analyses: list[LocalAnalysis] = []
    thresholds: list[float] = []
    for spec in specs:
        if spec.name == "confusion":
            thresholds.extend(spec.thresholds or bundle.manifest.thresholds)
    if thresholds:
        analyses.append(Confusion(tuple(thresholds)))
    return analyses


__all__ = ["Confusion", "Flow", "LocalAnalysis", "build_analyses"]
