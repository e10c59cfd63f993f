"""What the documents promise people and scripts is what the commands print.

docs/formats.md lists the names of `federation analyze --json` between ``documented-names`` markers; this
test runs the documented commands on a real offline study (scikit-learn's bundled breast-cancer records,
Wolberg et al., UCI, split into three sites; tests/breast_cancer.py) and checks that every documented name
is in the output, that no name of one statistics package's printout is (``qm``, ``qe``, ``knha``,
``auc_grid``), and that the terminal table reads as the documents describe it.
"""

from __future__ import annotations

import dataclasses
import json
import re
from pathlib import Path
from typing import Any

import pytest

from federation.cli import main as federation
from federation.stats.bivariate import SROCCurve
from site_agent.cli import main as site_agent

from . import breast_cancer

ROOT = Path(__file__).resolve().parents[1]
COPIED = {"qm", "qm_df", "qm_pvalue", "qe", "qe_df", "qe_pvalue", "auc_grid"}


def documented_names() -> dict[str, list[str]]:
    """{top-level key: backticked names documented under it} from docs/formats.md's marked list."""
    text = (ROOT / "docs" / "formats.md").read_text()
    block = text[text.index("<!-- documented-names -->") : text.index("<!-- /documented-names -->")]
    out: dict[str, list[str]] = {}
    for item in re.split(r"\n- ", block)[1:]:
        head = re.match(r"`([^`]+)`", item).group(1)
        names = re.findall(r"`([a-z_]+[a-z0-9_]*)`", item)
        out[head] = [n for n in names if n != head.split(".")[0] and n not in ("null", "wald", "hartung_knapp")]
    return out


def keys(value: Any) -> set[str]:
    """Every key anywhere in a JSON value."""
    if isinstance(value, dict):
        return set(value) | {k for v in value.values() for k in keys(v)}
    if isinstance(value, list):
        return {k for v in value for k in keys(v)}
    return set()


@pytest.fixture(scope="module")
def analysed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A three-site offline study with one subgroup variable, as `federation analyze` prints it (JSON, text)."""
    tmp = tmp_path_factory.mktemp("documented")
    study = breast_cancer.build(tmp / "study")
    store, request = tmp / "study.db", tmp / "request.json"
    args = ["request", "new", "--store", str(store), "--study-id", "bc-doc", "--bundle", str(study.bundle_path)]
    args += ["--sign", str(study.coordinator_key), "--out", str(request)]
    args += ["--analyses", "confusion,roc,subgroups", "--subgroup", "mean_radius=13"]
    assert federation(args) == 0
    releases = []
    for i, csv in enumerate(study.site_csvs):
        site_dir = tmp / f"site{i}"
        init = ["init", "--site-id", f"site-{i}", "--trust", str(study.coordinator_pub), "--site-dir", str(site_dir)]
        assert site_agent(init) == 0
        approve = ["model", "approve", str(study.bundle_path), "--site-dir", str(site_dir), "--by", "site IT"]
        assert site_agent(approve) == 0
        config = site_dir / "site.toml"
        config.write_text(
            config.read_text()
            .replace('allowed_subgroups = ["age_months", "sex"]', 'allowed_subgroups = ["mean_radius"]')
            .replace("min_cell_size = 10", "min_cell_size = 1")
        )
        out = tmp / f"release{i}.json"
        run = ["run", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(study.bundle_path)]
        assert site_agent([*run, "--data", str(csv), "--out", str(out)]) == 0
        enrol = ["enrol", "--store", str(store), "--site-id", f"site-{i}", "--key", str(site_dir / "site.pub")]
        assert federation(enrol) == 0
        releases.append(out)
    assert federation(["ingest", "--store", str(store), *map(str, releases)]) == 0
    return store


def _analyze(store: Path, capsys: pytest.CaptureFixture[str], *extra: str) -> str:
    capsys.readouterr()
    assert federation(["analyze", "--store", str(store), *extra]) == 0
    return capsys.readouterr().out


def test_every_documented_analysis_name_is_in_the_output(analysed, capsys) -> None:  # noqa: ANN001
    result = json.loads(_analyze(analysed, capsys, "--json"))
    documented = documented_names()
    assert set(documented) >= {"sites[]", "pooled", "subgroups.<variable>.<measure>"}
    site = result["sites"][0]
    assert set(documented["sites[]"]) - {"estimate", "ci_low", "ci_high"} <= set(site)
    assert {"estimate", "ci_low", "ci_high"} <= set(site["sensitivity"])
    pooled = result["pooled"]
    optional = {"site_id", "reason"} if not pooled["sites_not_pooled"] else set()  # names of a not-pooled site
    for name in set(documented["pooled"]) - optional:
        assert name in keys(pooled), name
    assert [f.name for f in dataclasses.fields(SROCCurve)] == ["false_positive_rate", "sensitivity", "area_under_curve"]
    measures = result["subgroups"]["mean_radius"]
    sensitivity = measures["sensitivity"]
    for name in documented["subgroups.<variable>.<measure>"]:
        assert name in keys(sensitivity), name
    between = sensitivity["between_subgroups"]
    assert set(between) == {"statistic", "distribution", "df", "p"}
    assert between["distribution"] in ("F", "chi-squared") and 0 <= between["p"] <= 1
    assert set(sensitivity["residual_heterogeneity"]) == {"q", "df", "p"}
    assert sensitivity["regression"]["test"] in ("hartung-knapp", "wald")
    assert not keys(result) & COPIED
    assert "knha" not in json.dumps(result)


def test_the_terminal_table_reads_as_documented(analysed, capsys) -> None:  # noqa: ANN001
    text = _analyze(analysed, capsys)
    head = text.splitlines()[2:4]
    assert "with the condition" in head[0] and "without the condition" in head[0]
    assert head[0].index("with the condition") < head[0].index("without the condition")
    assert re.search(r"screen \+\s+screen −\s+screen \+\s+screen −\s+sensitivity \(95% CI\)\s+specificity", head[1])
    assert "TP" not in text and "QM(" not in text and "QE(" not in text


def test_ledger_and_review_json_name_what_the_guides_read(analysed, tmp_path, capsys) -> None:  # noqa: ANN001
    site_dir = analysed.parent / "site0"
    capsys.readouterr()
    assert site_agent(["ledger", "verify", "--site-dir", str(site_dir), "--json"]) == 0
    verify = json.loads(capsys.readouterr().out)
    assert {"entries", "intact", "last_entry_hash"} <= set(verify)  # docs/ethics-board.md reads these
    head = verify["last_entry_hash"]
    assert site_agent(["ledger", "verify", "--site-dir", str(site_dir), "--json", "--expect-head", head]) == 0
    assert json.loads(capsys.readouterr().out)["expected_head"]["found_at_entry"] == verify["entries"]
    assert (site_dir / "held").is_dir() and (site_dir / "releases").is_dir()  # the folders docs/site-it.md lists
