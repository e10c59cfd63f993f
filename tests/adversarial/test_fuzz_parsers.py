"""Property-based fuzzing of every parser that reads bytes from another party (request, release, bundle
frame and body, scorecard) and of the site's own files (schema, mapping, site.toml policy).

Property (the rule for bad input): a parser accepts its input or raises a ValidationToolError with one
clear line; never another exception. Inputs are random bytes and structured mutations of a valid document
(a field replaced by any JSON value, or removed). Derandomised so `make test` is repeatable; the long
random campaigns are `make fuzz` (atheris, fuzz/run.py) on the same targets (fuzz/targets.py).
"""

from __future__ import annotations

import json
import re

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from federation.protocol import DocumentError, Release, Request
from fuzz.seeds import seeds
from fuzz.targets import TARGETS, check

FAST = settings(max_examples=60, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))

JSON = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=12), inner, max_size=4),
    max_leaves=12,
)
JSON_TARGETS = ("request", "signed_request", "release", "bundle_body", "scorecard")
TOML_TARGETS = ("schema", "mapping", "policy")


def _paths(node: object, prefix: tuple = ()) -> list[tuple]:
    out = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            out += _paths(value, (*prefix, key))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            out += _paths(value, (*prefix, index))
    return out


def _mutated(seed: bytes, path_index: int, value: object, delete: bool) -> bytes:
    doc = json.loads(seed)
    paths = [p for p in _paths(doc) if p]
    path = paths[path_index % len(paths)]
    node = doc
    for step in path[:-1]:
        node = node[step]
    if delete and isinstance(node, dict):
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return json.dumps(doc).encode()


@pytest.mark.parametrize("name", sorted(TARGETS))
@FAST
@given(data=st.binary(max_size=512))
def test_random_bytes_are_accepted_or_refused_cleanly(name: str, data: bytes) -> None:
    check(TARGETS[name], data)


@pytest.mark.parametrize("name", JSON_TARGETS)
@FAST
@given(path_index=st.integers(0, 10_000), value=JSON, delete=st.booleans())
def test_one_field_changed_is_accepted_or_refused_cleanly(
    name: str, path_index: int, value: object, delete: bool
) -> None:
    seed = seeds(name)[0]
    if name == "bundle_body":
        check(TARGETS[name], _mutated(seed, path_index, value, delete).replace(b" ", b""))
    else:
        check(TARGETS[name], _mutated(seed, path_index, value, delete))


TOML_VALUES = st.sampled_from(
    ['""', "-1", "0", "1e400", "nan", "inf", "[]", "[1, 2]", '["a", 1]', "{}", "{ a = 1 }", "true", "1979-05-27", '"x"']
)


@pytest.mark.parametrize("name", TOML_TARGETS)
@FAST
@given(line=st.integers(0, 200), value=TOML_VALUES, drop=st.booleans())
def test_one_toml_value_changed_is_accepted_or_refused_cleanly(name: str, line: int, value: str, drop: bool) -> None:
    lines = seeds(name)[0].decode().splitlines()
    settable = [i for i, text in enumerate(lines) if re.match(r"^\s*[A-Za-z_][A-Za-z0-9_]* = ", text)]
    index = settable[line % len(settable)]
    if drop:
        del lines[index]
    else:
        lines[index] = lines[index].split(" = ", 1)[0] + " = " + value
    check(TARGETS[name], "\n".join(lines).encode())


# --- regression tests: findings of the fuzzers, one per finding ------------------------------------------


def test_regression_release_with_nan_threshold_is_refused() -> None:
    """JSON's NaN token parses in Python; a NaN threshold must not reach the statistics."""
    doc = json.loads(seeds("release")[0])
    doc["results"]["confusion"][0]["threshold"] = float("nan")
    with pytest.raises(DocumentError):
        Release.from_bytes(json.dumps(doc).encode())


def test_regression_release_with_infinity_in_its_policy_is_refused() -> None:
    """A hypothesis finding: Infinity in an unchecked field (policy.allow_zero) broke the release id's canonical
    JSON with a ValueError; NaN and Infinity are refused wherever they stand, as no signed document holds them."""
    doc = json.loads(seeds("release")[0])
    doc["policy"]["allow_zero"] = float("inf")
    with pytest.raises(DocumentError, match="not finite"):
        Release.from_bytes(json.dumps(doc).encode())


def test_regression_request_with_deep_nesting_inside_a_field() -> None:
    doc = json.loads(seeds("request")[0])
    text = json.dumps(doc).replace('"issued_at": ', '"issued_at": ' + "[" * 50_000 + "]" * 50_000 + ', "x": ', 1)
    with pytest.raises(DocumentError):
        Request.from_bytes(text.encode(), None)


def test_regression_release_with_a_list_in_suppressed_is_refused() -> None:
    """Finding (hypothesis): a list inside results.confusion[].suppressed raised TypeError (unhashable)."""
    doc = json.loads(seeds("release")[0])
    doc["results"]["confusion"][0]["suppressed"] = [[], "tn"]
    with pytest.raises(DocumentError, match=r"suppressed: must list cell names"):
        Release.from_bytes(json.dumps(doc).encode())


def test_regression_scorecard_points_key_beyond_float_range_is_refused() -> None:
    """Finding (atheris, fuzz target scorecard): a points key of 55 digits parsed as an int but could not be
    looked up after the float conversion of the keys (KeyError while scoring)."""
    from federation.protocol import BundleError
    from federation.protocol.scoring import Scorecard
    from fuzz.targets import _schema

    card = json.loads(seeds("scorecard")[0])
    card["points"]["item_01"]["6" * 54 + "0"] = 0
    with pytest.raises(BundleError, match=r"scorecard.points.item_01: key '6+' is out of range"):
        Scorecard.from_json(json.dumps(card).encode(), _schema())


def test_regression_scorecard_with_an_empty_points_table_scores_zero_points() -> None:
    """Finding (hypothesis): an empty points table for a feature raised IndexError while scoring; an empty
    table means no points for any value (formats.md: a value absent from the table scores 0)."""
    import numpy as np

    from federation.protocol.scoring import Scorecard
    from fuzz.targets import _schema

    card = {"format": "scorecard", "kind": "points", "intercept": 1.5, "points": {"item_01": {}}}
    scores = Scorecard.from_json(json.dumps(card).encode(), _schema()).score(np.zeros((2, 3), dtype=np.float32))
    assert scores.tolist() == [1.5, 1.5]
