"""Request and release documents: validated on parse, errors name the field."""

from __future__ import annotations

import json
import re

import pytest

from federation.protocol import (
    AnalysisSpec,
    DocumentError,
    KeyRing,
    Release,
    Request,
    SignatureError,
    key_id,
    load_private_key,
    write_keypair,
)


@pytest.fixture
def key(tmp_path):
    private_path, _ = write_keypair(tmp_path, "coordinator")
    return load_private_key(private_path)


def request_doc(key) -> dict:
    request = Request("study-1", "req-1", "a" * 64, (AnalysisSpec("confusion", (0.4, 0.6)),), "2026-01-01T00:00:00")
    return json.loads(request.signed_bytes(key))


def ring(key) -> KeyRing:
    return KeyRing({key_id(key.public_key()): key.public_key()})


def test_request_round_trip(key):
    doc = request_doc(key)
    parsed = Request.from_bytes(json.dumps(doc).encode(), ring(key))
    assert parsed.analyses[0].thresholds == (0.4, 0.6)
    assert parsed.coordinator_key_id == key_id(key.public_key())


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda d: d.update(version=2), "unsupported request version"),
        (lambda d: d.pop("study_id"), "missing field 'study_id'"),
        (lambda d: d.update(analyses="confusion"), "request.analyses: wrong type"),
        (lambda d: d.update(analyses=[{"name": "everything"}]), "unknown analysis"),
        (lambda d: d.update(request_id="../../etc"), "request.request_id: malformed identifier"),
        (lambda d: d.update(kind="release"), "not a request document"),
    ],
)
def test_request_errors_name_the_field(key, change, message):
    doc = request_doc(key)
    change(doc)
    with pytest.raises(DocumentError, match=message.replace(".", r"\.").replace("(", r"\(")):
        Request.from_bytes(json.dumps(doc).encode(), None)


def test_request_edit_breaks_the_signature(key):
    doc = request_doc(key)
    doc["study_id"] = "study-2"
    with pytest.raises(SignatureError, match="does not verify"):
        Request.from_bytes(json.dumps(doc).encode(), ring(key))


def test_deeply_nested_or_huge_documents_are_refused():
    with pytest.raises(DocumentError, match="nested too deeply|not a JSON"):
        Request.from_bytes(b"[" * 100_000 + b"]" * 100_000, None)
    with pytest.raises(DocumentError, match="larger than"):
        Release.from_bytes(b" " * (9 * 1024 * 1024), "release")


@pytest.mark.parametrize("number", [b"NaN", b"Infinity", b"-Infinity", b"1e400"])
def test_a_number_that_is_not_finite_is_refused_on_parse(key, number):
    # RFC 8259 section 6: NaN and infinities are not JSON numbers; Python's json module reads them anyway, and
    # reads 1e400 as infinity. A release carrying one could not be hashed or stored (found by hypothesis).
    release = Release("s", "r", "b" * 64, "site", "t", {"min_cell_size": 10}, {"read": 5}, ())
    text = re.sub(rb'"read": *5', b'"read": ' + number, release.signed_bytes(key))
    assert number in text
    with pytest.raises(DocumentError, match="release: a number is not finite"):
        Release.from_bytes(text, "release")


def test_release_counts_must_be_counts(key):
    release = Release("s", "r", "b" * 64, "site", "t", {"min_cell_size": 10}, {"read": 5}, ())
    doc = json.loads(release.signed_bytes(key))
    doc["results"]["confusion"] = [{"threshold": 0.5, "cells": {"tp": -1, "fp": 0, "fn": 0, "tn": 0}, "suppressed": []}]
    with pytest.raises(DocumentError, match=r"cells\.tp: a count must be a non-negative integer"):
        Release.from_bytes(json.dumps(doc).encode(), "release")
    doc["results"]["confusion"][0]["cells"]["tp"] = None
    with pytest.raises(DocumentError, match="must list exactly the cells that are null"):
        Release.from_bytes(json.dumps(doc).encode(), "release")


def test_the_calibration_intercept_reads_under_its_earlier_name_too():
    # Releases made before the key was renamed say "citl"; a current release's key wins when both are present.
    from federation.protocol.documents import calibration_intercept

    assert calibration_intercept({"citl": -0.25, "citl_se": 0.1}) == -0.25
    assert calibration_intercept({"citl": -0.25, "citl_se": 0.1}, "_se") == 0.1
    assert calibration_intercept({"calibration_intercept": 0.5, "citl": -0.25}) == 0.5
    assert calibration_intercept({}) is None
