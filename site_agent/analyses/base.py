"""What every local analysis provides: accumulate over chunks, then counts, then the released JSON."""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from ..counts import CountSet
from ..data import PreparedChunk


class CellPolicy(Protocol):
    """The part of the site policy an analysis needs to merge bands (site_agent.config.Policy has it)."""

    min_cell_size: int
    allow_zero: bool


class LocalAnalysis(Protocol):
    """One analysis a request names. Accumulation is additive over chunks (memory stays flat)."""

    name: str

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None: ...

    def counts(self, policy: CellPolicy) -> CountSet:
        """Named counts with definitions; banded analyses merge bands first (site_agent.banding)."""
        ...

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> Any:
        """The JSON the release carries, from the counts and derived statistics that may be shown."""
        ...
