"""Numbers read out of a site's release JSON: a count, or a finite number, else ``None``.

A withheld count is ``null`` in a release, and a field from another party may hold anything: every reader of
release sections (analysis, further analyses, decisions, ranges, export) takes values through these two, so
that a withheld, missing or malformed value reads the same everywhere.
"""

from __future__ import annotations

import math
from typing import Any


def count_or_none(value: Any) -> int | None:
    """``value`` if it is a whole count (an ``int``, not a ``bool``, zero or more), else ``None``."""
    return value if isinstance(value, int) and not isinstance(value, bool) and value >= 0 else None


def number_or_none(value: Any) -> float | None:
    """``value`` as a float if it is a finite number (not a ``bool``), else ``None``."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        return None
    return float(value)
