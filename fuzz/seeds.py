"""Valid inputs for each fuzz target: the starting corpus for atheris and the base that hypothesis mutates."""

from __future__ import annotations

import json

from federation.protocol import AnalysisSpec, ConfusionTable, Release, Request, pack_bundle
from federation.protocol.documents import SubgroupSpec

from .targets import SCHEMA_TOML, _key, _schema, site_folder

SCORECARD = {
    "format": "scorecard",
    "kind": "logistic",
    "intercept": -2.0,
    "points": {"item_01": {"0": 0, "1": 0.5, "2": 1, "3": 1.5}, "sex": {"female": 0, "male": 0.2}},
    "weights": {"age_months": -0.01},
}

MAPPING = """missing = ["", "NA"]

[outcome]
column = "dx"
positive = ["yes", "1"]
negative = ["no", "0"]

[features.item_01]
column = "Q1"

[features.sex]
column = "gender"
codes = { "M" = "male", "F" = "female" }

[features.age_months]
column = "age_years"
multiply = 12

[id]
column = "record_id"
"""


def site_toml() -> bytes:
    return (site_folder() / "seed.toml").read_bytes()


def request_bytes() -> bytes:
    return Request(
        study_id="fuzz-study",
        request_id="r-1",
        bundle_sha256="ab" * 32,
        analyses=(
            AnalysisSpec("confusion", (0.3, 0.5)),
            AnalysisSpec("roc", bands=(0.1, 0.5, 0.9)),
            AnalysisSpec("subgroups", subgroups=(SubgroupSpec("sex"), SubgroupSpec("age_months", (24.0, 36.0)))),
            AnalysisSpec("paired", (0.5, 0.5), compare_bundle_sha256="cd" * 32),
        ),
        issued_at="2026-01-01T00:00:00+00:00",
    ).signed_bytes(_key())


def release_bytes() -> bytes:
    return Release(
        study_id="fuzz-study",
        request_id="r-1",
        bundle_sha256="ab" * 32,
        site_id="site-a",
        created_at="2026-01-01T00:00:00+00:00",
        policy={"min_cell_size": 10, "allow_zero": True},
        flow={
            "read": 120,
            "analysed": 110,
            "analysed_positive": 40,
            "analysed_negative": 70,
            "excluded": {"missing_feature": 10, "out_of_range": None},
            "suppressed": ["excluded.out_of_range"],
        },
        confusion=(ConfusionTable(0.5, {"tp": 30, "fp": 10, "fn": None, "tn": None}, ("fn", "tn")),),
        extra={"roc": {"auc": 0.8, "bands": [{"low": None, "high": 0.5, "positive": 10, "negative": 50}]}},
    ).signed_bytes(_key())


def bundle_bytes() -> bytes:
    return pack_bundle(
        model_bytes=json.dumps(SCORECARD).encode(),
        model_format="scorecard",
        schema=_schema(),
        score_kind="probability",
        thresholds=[0.5],
        private_key=_key(),
        created_at="2026-01-01T00:00:00+00:00",
    )


def seeds(target: str) -> list[bytes]:
    if target in ("request", "signed_request"):
        return [request_bytes()]
    if target == "release":
        return [release_bytes()]
    if target == "bundle_frame":
        return [bundle_bytes()]
    if target == "bundle_body":
        return [bundle_bytes().split(b"\n", 3)[3]]
    if target == "scorecard":
        return [json.dumps(SCORECARD).encode()]
    if target == "schema":
        return [SCHEMA_TOML.encode()]
    if target == "mapping":
        return [MAPPING.encode()]
    if target == "policy":
        return [site_toml()]
    raise KeyError(target)
