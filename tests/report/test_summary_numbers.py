"""Every number in the report's summary equals `federation analyze --json` for the same store."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from federation.report import build_report
from federation.store import Store

from .dom import Node, parse
from .studies import analyze_json


def resolve(analysis: dict[str, Any], key: str) -> Any:
    """The value a ``data-key`` names: a dotted path, list items by index, ``#len`` for a list's length."""
    path, _, suffix = key.partition("#")
    value: Any = analysis
    for step in path.split("."):
        value = value[int(step)] if isinstance(value, list) else value[step]
    return len(value) if suffix == "len" else value


def expected_text(key: str, value: Any) -> str:
    """How the summary writes a value: proportions as % to 0.1, I² to whole %, tau² to 3 places, counts whole;
    a between-site SD (tau) and the correlation of the logits to 3 places, with a minus sign."""
    parts = key.split(".")
    last = parts[-1]
    if key.endswith("#len") or isinstance(value, int):
        return str(value)
    if last.startswith("i2_"):
        return f"{100 * value:.0f}%"
    if last.startswith("tau2_"):
        return f"{value:.3f}"
    if len(parts) > 1 and (parts[1].startswith("tau_logit_") or parts[1] == "correlation"):
        return f"{value:.3f}".replace("-", "−")
    return f"{100 * value:.1f}%"


def _strip(node: Node) -> str:
    """Text of ``node`` with traced numbers, quoted analysis text and identifiers removed."""
    parts = []
    for child in node.children:
        if isinstance(child, str):
            parts.append(child)
        elif not ({"num", "quote", "ident"} & child.classes()):
            parts.append(_strip(child))
    return "".join(parts)


@pytest.mark.parametrize("which", ["demo_store", "one_site_store"])
def test_summary_numbers_equal_the_analysis(which: str, request: pytest.FixtureRequest, tmp_path: Path) -> None:
    store_path: Path = request.getfixturevalue(which)
    analysis = analyze_json(store_path)
    store = Store(store_path)
    html = build_report(store).html
    store.close()
    summary = parse(html).find_id("summary")
    assert summary is not None

    numbers = [n for n in summary.iter("span") if "num" in n.classes()]
    for span in numbers:
        key = span.attrs["data-key"]
        value = resolve(analysis, key)
        assert float(span.attrs["data-value"]) == value, key  # exact: the same JSON number
        assert span.text() == expected_text(key, value), key
    quotes = [n for n in summary.iter("span") if "quote" in n.classes()]
    for span in quotes:
        assert span.text() == resolve(analysis, span.attrs["data-key"]), span.attrs["data-key"]

    keys = {span.attrs["data-key"] for span in numbers}
    assert {"pooled.sites_pooled#len", "sites#len"} <= keys
    if analysis["pooled"]["sensitivity"] is not None:
        for name in ("sensitivity", "specificity"):
            assert {f"pooled.{name}.estimate", f"pooled.{name}.ci_low", f"pooled.{name}.ci_high"} <= keys
            assert f"pooled.tau2_logit_{name}" in keys
            assert analysis["pooled"][f"i2_logit_{name}"] is None or f"pooled.i2_logit_{name}" in keys
    else:
        assert "pooled.note" in {span.attrs["data-key"] for span in quotes}

    # No other number: once traced numbers, quotes and identifiers are removed, only the "95%" of the
    # interval labels may still contain a digit.
    rest = _strip(summary).replace("95%", "")
    assert not re.search(r"[0-9]", rest), re.findall(r".{30}[0-9].{30}", rest)


def test_report_is_reproducible_from_the_store(demo_store: Path) -> None:
    store = Store(demo_store)
    first, second = build_report(store).html, build_report(store).html
    store.close()
    assert first == second
