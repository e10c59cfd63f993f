"""What every local analysis provides: accumulate over chunks, then counts, then the released JSON."""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from ..counts import CountSet
from ..data import PreparedChunk


class LocalAnalysis(Protocol):
    """One analysis a request names. Accumulation is additive over chunks (memory stays flat)."""

    name: str

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None: ...

    def counts(self) -> CountSet: ...

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> Any:
        """The JSON the release carries, from the counts and derived statistics that may be shown."""
        ...
