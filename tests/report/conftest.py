"""Study stores and rendered reports shared by the report tests (built once per test session)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from . import studies


@pytest.fixture(scope="session")
def demo_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return studies.demo_store(tmp_path_factory.mktemp("report-demo") / "study")


@pytest.fixture(scope="session")
def one_site_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return studies.one_site_store(tmp_path_factory.mktemp("report-one-site") / "study")


@pytest.fixture(scope="session")
def extended_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return studies.extended_store(tmp_path_factory.mktemp("report-extended") / "study")


@pytest.fixture(scope="session")
def demo_report(demo_store: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo study's report, written by the `federation report` command in its own process."""
    out = tmp_path_factory.mktemp("report-demo-out") / "report.html"
    result = studies.federation_process("report", "--store", str(demo_store), "--out", str(out))
    assert result.returncode == 0, result.stderr
    return out


@pytest.fixture(scope="session")
def extended_report(extended_store: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict]:
    """The extended study's report and what `federation report --json` said about it."""
    out = tmp_path_factory.mktemp("report-extended-out") / "report.html"
    result = studies.federation("report", "--store", str(extended_store), "--out", str(out), "--json")
    assert result.returncode == 0, result.stderr
    return out, json.loads(result.stdout)
