"""`federation request new` warns (one line each, on stderr, not blocking) when a requested analysis is known
to cost the sites' disclosure control dearly; a plain request gets no warning. The request is written either
way."""

from __future__ import annotations

from pathlib import Path

import pytest

from federation.cli import main as federation
from federation.protocol import Request

from . import breast_cancer


@pytest.fixture
def study(tmp_path: Path) -> breast_cancer.Study:
    return breast_cancer.build(tmp_path / "study")


def request_new(study: breast_cancer.Study, tmp_path: Path, *extra: str) -> tuple[int, Path]:
    out = tmp_path / f"request-{len(list(tmp_path.glob('request-*')))}.json"
    args = ["request", "new", "--store", str(tmp_path / "study.db"), "--study-id", "bc-w", "--bundle"]
    args += [str(study.bundle_path), "--sign", str(study.coordinator_key), "--out", str(out), *extra]
    return federation(args), out


def test_a_plain_request_has_no_warning(study, tmp_path, capsys) -> None:
    code, out = request_new(study, tmp_path, "--analyses", "confusion,roc")
    assert code == 0 and out.exists()
    assert capsys.readouterr().err == ""


def test_costly_analyses_are_named_one_line_each(study, tmp_path, capsys) -> None:
    fine = ",".join(f"{i / 100:g}" for i in range(1, 100))  # 99 edges, 0.01 apart
    thresholds = ",".join(f"{i / 10:g}" for i in range(1, 10))  # 9 thresholds
    code, out = request_new(
        study,
        tmp_path,
        "--analyses",
        "confusion,roc,agreement,subgroups",
        "--roc-bands",
        fine,
        "--thresholds",
        thresholds,
        "--subgroup",
        "mean_radius=8,10,12,14,16,18,20,22",
    )
    assert code == 0
    assert [a.name for a in Request.from_bytes(out.read_bytes(), None).analyses] == [
        "confusion",
        "roc",
        "agreement",
        "subgroups",
    ]
    lines = capsys.readouterr().err.strip().splitlines()
    assert all(line.startswith("federation: warning: ") for line in lines)
    text = "\n".join(lines)
    assert "roc (--roc-bands): 99 band edges, the narrowest 0.01 wide" in text
    assert "confusion (--thresholds): 9 thresholds" in text and "agreement (--thresholds): 9 thresholds" in text
    assert "agreement: a second reference standard with missing values" in text
    assert "subgroups (mean_radius): 9 levels" in text
    assert len(lines) == 5
