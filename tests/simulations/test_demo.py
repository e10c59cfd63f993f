"""The demo's whole job end to end (offline engine: the same site and coordinator code as `make demo`).

External references, named beside each check:
- scikit-learn: the demo model's own ``predict_proba`` (the fitted estimator, not the ONNX the sites run) gives
  each site's 2×2 table; ``roc_auc_score`` gives each model's AUC (Mann–Whitney with ties counted 1/2, the
  sites' method); ``cohen_kappa_score`` gives kappa.
- statsmodels: ``combine_effects`` (DerSimonian–Laird) pools logit sensitivity as our univariate line does.
- pandas: ``read_csv`` reads every exported table with its defaults (``NA`` read as missing).
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import platform
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score, roc_auc_score
from statsmodels.stats.meta_analysis import combine_effects

from federation.cli import main as federation_main
from federation.store import Store
from simulations.consortium import (
    FEATURES,
    LONG_ITEMS,
    LONG_THRESHOLD,
    SITES,
    SMALL_SITE_ID,
    THRESHOLD,
    _site_data,
    model_inputs,
    train_demo_model,
    write_consortium,
)
from simulations.demo import STUDY_ID, prepare_study, run_demo
from site_agent.config import load_site
from site_agent.runner import run_request

SECTIONS = (
    "participant flow",
    "Discrimination (ROC from score bands)",
    "Calibration",
    "Subgroups by age_months",
    "Subgroups by subtype",
    "Accuracy by score margin",
    "Agreement with a second reference standard",
    "Paired comparison with the second model",
)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, int]:
    root = tmp_path_factory.mktemp("demo") / "out"
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = run_demo(root, engine="offline")
    return root, out.getvalue(), code


def _records(data: Path, mapping_path: Path) -> pd.DataFrame:
    """The site's valid records in schema terms, read from docs/formats.md's rules independently of the agent:
    every input of both models present and in range, the reference standard known."""
    mapping = tomllib.loads(mapping_path.read_text())
    local = pd.read_csv(data, dtype=str, keep_default_na=False)
    missing = set(mapping.get("missing", ["", "NA", "."]))
    features = mapping.get("features", {})
    frame = pd.DataFrame(index=local.index)
    valid = pd.Series(True, index=local.index)
    for name in (*LONG_ITEMS, "age_months"):
        spec = features.get(name, {})
        text = local[spec.get("column", name)]
        value = pd.to_numeric(text.where(~text.isin(missing)), errors="coerce") * spec.get("multiply", 1)
        whole = value.round()
        valid &= ((value - whole).abs() <= 1e-9) & whole.between(0, 3 if name != "age_months" else 240)
        frame[name] = whole
    sex = local[features["sex"]["column"]]
    frame["sex"] = sex.map(features["sex"]["codes"])
    valid &= frame["sex"].notna()
    subtype = local[features["subtype"]["column"]]
    frame["subtype"] = subtype.map(features["subtype"]["codes"]).where(~subtype.isin(missing), "none")
    valid &= frame["subtype"].notna()
    outcome = mapping["outcome"]
    text = local[outcome["column"]]
    frame["outcome"] = np.where(text.isin(outcome["positive"]), 1, np.where(text.isin(outcome["negative"]), 0, -1))
    valid &= frame["outcome"] >= 0
    if "reference2" in mapping:
        second = local[mapping["reference2"]["column"]]
        frame["reference2"] = np.where(
            second.isin(mapping["reference2"]["positive"]),
            1,
            np.where(second.isin(mapping["reference2"]["negative"]), 0, -1),
        )
    return frame[valid].astype({name: int for name in (*LONG_ITEMS, "age_months")})


def _expected(root: Path) -> dict[str, dict]:
    """Per site: the 2x2 cells at THRESHOLD, both AUCs and the kappas, from scikit-learn on the site's records."""
    model = train_demo_model(root / "consortium" / "development.csv")
    out = {}
    for site_dir in sorted((root / "consortium" / "sites").iterdir()):
        frame = _records(site_dir / "data.csv", site_dir / "mapping-full.toml")
        score = model.predict_proba(model_inputs(frame[list(FEATURES) + ["outcome"]]))[:, 1]
        called = score >= THRESHOLD
        truth = frame["outcome"].to_numpy() == 1
        points = frame[list(LONG_ITEMS)].sum(axis=1).to_numpy()
        entry = {
            "cells": {
                "tp": int((called & truth).sum()),
                "fp": int((called & ~truth).sum()),
                "fn": int((~called & truth).sum()),
                "tn": int((~called & ~truth).sum()),
            },
            "truth": truth,
            "score": score,
            "points": points.astype(float),
            "long_called": points >= LONG_THRESHOLD,
            "n": len(frame),
            "frame": frame,
        }
        if "reference2" in frame:
            both = frame["reference2"].to_numpy() >= 0
            entry["kappa_reference_reference2"] = cohen_kappa_score(truth[both], frame["reference2"].to_numpy()[both])
        out[site_dir.name] = entry
    return out


def _band_of(scores: np.ndarray, bands: list[dict]) -> np.ndarray:
    """Each record's released band (low <= score < high), the bands from the first to the last with a withheld
    count read as one (docs/formats.md, "Derived statistics")."""
    index = np.searchsorted([b["low"] for b in bands[1:]], scores, side="right")
    hidden = [j for j, b in enumerate(bands) if b["positive"] is None or b["negative"] is None]
    if hidden:
        index = np.where((index >= hidden[0]) & (index <= hidden[-1]), hidden[0], index)
    return index


def test_demo_runs_every_analysis_and_prints_them_in_the_paper_order(demo) -> None:
    root, stdout, code = demo
    assert code == 0, stdout
    positions = [stdout.find(title) for title in SECTIONS]
    assert -1 not in positions, [t for t, p in zip(SECTIONS, positions, strict=True) if p < 0]
    assert positions == sorted(positions)
    assert stdout.find("pooled (random effects)") < positions[0]
    # band labels read as bands (integer months), never as program objects
    for label in ("under 36 months", "36-47 months", "48 months and over"):
        assert label in stdout
    assert "{'" not in stdout and "'low'" not in stdout
    assert (root / "report.html").is_file() and (root / "results" / "accuracy.csv").is_file()


def test_released_tables_are_those_the_model_gives_and_pool_as_statsmodels_does(demo) -> None:
    """Every released cell and flow count equals scikit-learn's count on the site's records; the small site
    (every cell 1..9) is withheld and still enters the censored exact model; the univariate line equals
    statsmodels' DerSimonian-Laird on the pooled sites' logit sensitivities."""
    root, _, _ = demo
    expected = _expected(root)
    analysis = json.loads((root / "results" / "analysis.json").read_text())
    sites = {s["site_id"]: s for s in analysis["sites"]}
    assert set(sites) == set(expected)
    released = 0
    for site_id, site in sites.items():
        for cell, value in expected[site_id]["cells"].items():
            assert site[cell] in (None, value), (site_id, cell)
            released += site[cell] is not None
        assert site["flow"]["analysed"] in (None, expected[site_id]["n"])
    assert released >= 12
    assert all(sites[SMALL_SITE_ID][c] is None for c in ("tp", "fp", "fn", "tn"))
    # The univariate sensitivity analysis pools the complete tables as statsmodels' DerSimonian-Laird does.
    pooled = analysis["pooled"]["sensitivity_analyses"]["univariate"]
    assert len(pooled["sites_pooled"]) >= 2
    logits, variances = [], []
    for site_id in pooled["sites_pooled"]:
        tp, fn = expected[site_id]["cells"]["tp"], expected[site_id]["cells"]["fn"]
        logits.append(math.log(tp / fn))
        variances.append(1 / tp + 1 / fn)
    reference = combine_effects(np.array(logits), np.array(variances), method_re="dl")
    pooled_logit = math.log(pooled["sensitivity"]["estimate"] / (1 - pooled["sensitivity"]["estimate"]))
    assert pooled_logit == pytest.approx(reference.mean_effect_re, abs=1e-9)
    aware = analysis["pooled"]["bivariate_glmm_suppression_aware"]
    assert SMALL_SITE_ID in aware["sites_pooled"] and len(aware["sites_pooled"]) == len(sites)


def test_every_site_but_the_small_one_releases_and_pools_its_whole_primary_table(demo) -> None:
    """The primary 2x2 survives the full request: the audit cuts back the other analyses first."""
    root, _, _ = demo
    expected = _expected(root)
    analysis = json.loads((root / "results" / "analysis.json").read_text())
    sites = {s["site_id"]: s for s in analysis["sites"]}
    large = sorted(s for s in sites if s != SMALL_SITE_ID)
    for site_id in large:
        assert [sites[site_id][c] for c in ("tp", "fp", "fn", "tn")] == list(expected[site_id]["cells"].values())
    # The univariate sensitivity analysis pools the complete tables; the headline also keeps the small site.
    assert sorted(analysis["pooled"]["sensitivity_analyses"]["univariate"]["sites_pooled"]) == large
    assert sorted(analysis["pooled"]["sites_pooled"]) == sorted([*large, SMALL_SITE_ID])
    accuracy = pd.read_csv(root / "results" / "accuracy.csv")
    assert accuracy.query("site_id != 'pooled'")[["tp", "fp", "fn", "tn"]].notna().all(axis=1).sum() == len(large)
    # Each pooled row carries the numbers of the model it names (found by following the coordinator's guide: the
    # headline's numbers were labelled univariate DerSimonian-Laird, whose own numbers were in no row).
    pooled = accuracy.query("site_id == 'pooled'").set_index("model")
    headline = next(m for m in pooled.index if m.startswith("headline: "))
    assert pooled.loc[headline, "sensitivity"] == analysis["pooled"]["sensitivity"]["estimate"]
    assert pooled.loc[headline, "sites_pooled"] == len(large) + 1
    univariate = analysis["pooled"]["sensitivity_analyses"]["univariate"]
    row = pooled.loc["univariate DerSimonian-Laird (complete tables)"]
    assert row["sensitivity"] == univariate["sensitivity"]["estimate"] != pooled.loc[headline, "sensitivity"]
    assert row["specificity_ci_high"] == univariate["specificity"]["ci_high"] and row["sites_pooled"] == len(large)
    releases = json.loads((root / "results" / "releases.json").read_text())
    kappas = [
        r["results"]["agreement"]["tables"][0]["pairs"]["reference_reference2"]["kappa"]
        for r in releases
        if r["results"]["agreement"].get("available")
    ]
    # the model-vs-reference pair is cut back (the blank second verdicts leave small strata beside the released
    # 2x2); the two references' kappa survives at three sites (checked against scikit-learn above) and is pooled
    assert sum(k is not None for k in kappas) >= 3
    pooled_kappa = analysis["agreement"]["reference_reference2"]["kappa"]
    assert 0.6 < pooled_kappa["estimate"] < 0.9 and len(pooled_kappa["sites_pooled"]) >= 3


def test_paired_comparison_and_agreement_match_scikit_learn(demo) -> None:
    root, _, _ = demo
    expected = _expected(root)
    releases = json.loads((root / "results" / "releases.json").read_text())
    for release in releases:
        site_id = release["site_id"]
        paired = release["results"]["paired"]
        truth = expected[site_id]["truth"]
        for key, scores in (("model", expected[site_id]["score"]), ("compare", expected[site_id]["points"])):
            if paired.get(f"auc_{key}") is not None:  # withheld where a class total is
                # the AUC of the released bands: scikit-learn on each record's band, a run of withheld bands one
                assert paired[f"auc_{key}"] == pytest.approx(
                    roc_auc_score(truth, _band_of(scores, paired[f"{key}_bands"])), abs=1e-6
                )
        agreement = release["results"]["agreement"]
        if agreement.get("available"):
            kappa = agreement["tables"][0]["pairs"]["reference_reference2"]["kappa"]
            if kappa is not None:
                assert kappa == pytest.approx(expected[site_id]["kappa_reference_reference2"], abs=1e-9)
    assert sum(r["results"]["agreement"].get("available", False) for r in releases) == 5
    # The comparison model's AUC comes from its own released bands at most sites; the SE of the difference needs
    # the joint banded table, whose corners are sparse at these sites' sizes for k = 10 (two correlated scores),
    # so only two sites give it (docs/formats.md, "Derived statistics": a record-level covariance
    # would be a further fact about the records), and the pooled difference rests on those two.
    assert sum(r["results"]["paired"]["auc_compare"] is not None for r in releases) >= 2
    with_se = sorted(r["site_id"] for r in releases if r["results"]["paired"]["auc_difference_se"] is not None)
    assert len(with_se) == 2
    analysis = json.loads((root / "results" / "analysis.json").read_text())
    auc = analysis["paired"]["auc_difference"]
    assert sorted(auc["sites_pooled"]) == with_se and auc["pooled"]["n_studies"] == 2
    assert auc["ci_low"] < auc["estimate"] < auc["ci_high"]


def test_roc_aucs_match_scikit_learn_and_survive_at_most_sites(demo) -> None:
    """Each site's released ROC AUC is scikit-learn's roc_auc_score on each record's released band (a run of
    withheld bands read as one), and the ROC bands keep an AUC at five of the eight sites. Until 2026-12-05
    the audit, taking a paired comparison's model band as a paired count, withheld the ROC band it is (the
    same count) and left an AUC at two sites; it now takes the paired table's own cells first."""
    root, _, _ = demo
    expected = _expected(root)
    releases = json.loads((root / "results" / "releases.json").read_text())
    shown = 0
    for release in releases:
        roc = release["results"]["roc"]
        if roc["auc"] is None:
            continue
        shown += 1
        site = expected[release["site_id"]]
        assert roc["auc"] == pytest.approx(
            roc_auc_score(site["truth"], _band_of(site["score"], roc["bands"])), abs=1e-6
        )
    assert shown >= 5
    pooled = json.loads((root / "results" / "analysis.json").read_text())["discrimination"]["pooled_auc"]
    assert len(pooled["sites_pooled"]) == shown


def test_where_a_site_withheld_its_auc_the_bounds_hold_the_auc_of_its_records(demo) -> None:
    """Each site that withheld its AUC gets the smallest and largest AUC its released band counts allow
    (docs/formats.md); scikit-learn's roc_auc_score on each record's own band lies between them."""
    root, _, _ = demo
    expected = _expected(root)
    releases = json.loads((root / "results" / "releases.json").read_text())
    table = pd.read_csv(root / "results" / "discrimination.csv").set_index("site_id")
    withheld = [r for r in releases if r["results"]["roc"]["auc"] is None]
    assert withheld
    for release in withheld:
        bands = release["results"]["roc"]["bands"]
        site = expected[release["site_id"]]
        index = np.searchsorted([b["low"] for b in bands[1:]], site["score"], side="right")
        truth = roc_auc_score(site["truth"], index)
        low, high = table.loc[release["site_id"], ["auc_bound_low", "auc_bound_high"]]
        assert low <= truth <= high
        assert high - low < 0.5  # a bound, not the whole of 0..1
        # the report says so in words, beside the pooled AUC
        assert f"{release['site_id']} {low:.3f} to {high:.3f}" in (root / "report.html").read_text()
    shown = table.drop(index="pooled")
    assert shown["auc_bound_low"].notna().sum() == len(withheld)
    assert shown["auc"].notna().sum() + len(withheld) == len(releases)


def test_where_a_subgroup_level_withheld_its_auc_the_bounds_hold_the_auc_of_its_records(demo) -> None:
    """Each subgroup level that withheld its AUC, with both classes present, gets the smallest and largest AUC
    its released counts allow (docs/formats.md); scikit-learn's roc_auc_score on the level's records, each at
    its own band, lies between them."""
    root, _, _ = demo
    expected = _expected(root)
    releases = {r["site_id"]: r for r in json.loads((root / "results" / "releases.json").read_text())}
    table = pd.read_csv(root / "results" / "subgroups.csv")
    bounded = 0
    for (site_id, variable), rows in table.groupby(["site_id", "variable"], sort=False):
        variables = releases[site_id]["results"]["subgroups"]["variables"]
        levels = next(v["levels"] for v in variables if v["variable"] == variable)
        assert len(levels) == len(rows)
        site = expected[site_id]
        for level, (_, row) in zip(levels, rows.iterrows(), strict=True):
            if pd.isna(row["auc_bound_low"]):
                continue
            bounded += 1
            assert pd.isna(row["auc"])
            values = site["frame"][variable].to_numpy()
            raw = level["level"]
            if isinstance(raw, dict):
                low, high = raw["low"], raw["high"]
                inside = (values >= (-np.inf if low is None else low)) & (values < (np.inf if high is None else high))
            else:
                inside = values == raw
            bands = level["roc"]["bands"]
            index = np.searchsorted([b["low"] for b in bands[1:]], site["score"][inside], side="right")
            truth = roc_auc_score(site["truth"][inside], index)
            assert row["auc_bound_low"] - 1e-12 <= truth <= row["auc_bound_high"] + 1e-12
            assert (
                f"{site_id}, {variable} {row['level']}: {row['auc_bound_low']:.3f}"
                in (root / "report.html").read_text()
            )
    assert bounded >= 5  # 7 levels at five sites on 2026-12-05


def test_export_tables_parse_with_pandas_and_agree_with_the_flow(demo) -> None:
    root, _, _ = demo
    results = root / "results"
    codebook = pd.read_csv(results / "codebook.csv")
    written = sorted(p.name for p in results.glob("*.csv") if p.name != "codebook.csv")
    assert sorted(set(codebook["file"])) == written
    for name in ("flow", "accuracy", "roc_bands", "discrimination", "calibration", "subgroups", "margin"):
        assert f"{name}.csv" in written
    for name in ("agreement", "paired", "subgroups_pooled", "pooled"):
        assert f"{name}.csv" in written
    text_columns = {"site_id", "model", "withheld", "variable", "level", "side", "pair", "first", "second", "group"}
    text_columns |= {
        "measure",
        "analysis",
        "quantity",
        "scale",
        "note",
        "file",
        "column",
        "meaning",
        "status",
        "criterion",
    }
    for path in results.glob("*.csv"):
        frame = pd.read_csv(path)
        for column in frame.columns:  # a number column holds numbers and NA, never a word
            if column not in text_columns:
                assert pd.api.types.is_numeric_dtype(frame[column]), (path.name, column)
    accuracy = pd.read_csv(results / "accuracy.csv")
    flow = pd.read_csv(results / "flow.csv").set_index("site_id")
    sites = accuracy[accuracy["site_id"] != "pooled"].set_index("site_id")
    for column in ("tp", "fp", "fn", "tn", "sensitivity"):
        assert pd.api.types.is_numeric_dtype(sites[column]), column
    assert sites.loc[SMALL_SITE_ID, ["tp", "fp", "fn", "tn"]].isna().all()
    assert sites.loc[SMALL_SITE_ID, "withheld"] == "tp;fp;fn;tn"
    complete = sites.dropna(subset=["tp", "fp", "fn", "tn"])
    assert len(complete) >= 2
    totals = complete[["tp", "fp", "fn", "tn"]].sum(axis=1)
    assert (totals == flow.loc[complete.index, "analysed"]).all()
    assert (complete["tp"] + complete["fn"] == flow.loc[complete.index, "analysed_with_condition"]).all()
    known = flow.dropna(subset=["excluded_total", "analysed"])
    assert (known["read"] - known["excluded_total"] == known["analysed"]).all()
    # each name in a flow row's withheld column is a column of the table, and that column is NA in the row
    for site_id, row in flow.iterrows():
        for name in str(row["withheld"]).split(";") if isinstance(row["withheld"], str) else []:
            assert name in flow.columns and pd.isna(row[name]), (site_id, name)
    pooled = accuracy[accuracy["site_id"] == "pooled"]
    assert {"univariate DerSimonian-Laird (complete tables)", "bivariate glmm"} <= set(pooled["model"])
    subgroups = pd.read_csv(results / "subgroups.csv")
    ages = subgroups[subgroups["variable"] == "age_months"]
    assert set(ages["level"]) == {"under 36 months", "36-47 months", "48 months and over"}
    assert set(ages["band_low"].dropna()) == {36, 48} and set(ages["band_high"].dropna()) == {36, 48}
    assert set(subgroups[subgroups["variable"] == "subtype"]["level"]) == {"none", "early_onset", "late_onset"}
    margin = pd.read_csv(results / "margin.csv")
    assert set(margin["distance_from"].dropna()) <= {0, 0.05, 0.1, 0.2}  # as the request wrote them
    assert set(margin["distance_to"].dropna()) <= {0.05, 0.1, 0.2}


def _cli(*args: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = federation_main(list(args))
    return code, out.getvalue(), err.getvalue()


def test_analyze_and_export_name_enrolled_sites_that_sent_nothing(tmp_path: Path) -> None:
    study = prepare_study(tmp_path / "demo")
    store = Store(study.store_path)
    answered = study.site_dirs[:2]
    store.ingest(
        [(run_request(load_site(d), study.request_bytes, study.bundle_bytes).release_bytes, str(d)) for d in answered]
    )
    store.close()
    silent = sorted(d.name for d in study.site_dirs[2:])
    code, out, _ = _cli("analyze", "--store", str(study.store_path))
    assert code == 3
    assert f"no release yet from {len(silent)} enrolled site(s): " in out and all(s in out for s in silent)
    code, out, err = _cli("analyze", "--store", str(study.store_path), "--json")
    assert code == 3 and json.loads(out)["study_id"] == STUDY_ID and silent[0] in err
    code, out, _ = _cli("export", "--store", str(study.store_path), "--out-dir", str(tmp_path / "results"))
    assert code == 3 and silent[0] in out
    assert len(pd.read_csv(tmp_path / "results" / "accuracy.csv").query("site_id != 'pooled'")) == 2
    code, _, err = _cli("export", "--store", str(tmp_path / "nothing.db"), "--out-dir", str(tmp_path / "r2"))
    assert code == 1 and "study store not found" in err and len(err.strip().splitlines()) == 1


def test_short_form_records_do_not_depend_on_what_the_full_study_adds(tmp_path: Path) -> None:
    """The further items, subtype and second verdicts come from their own generator, so a site's short-form
    export (and so every primary-only table) is the same with or without them."""
    consortium = write_consortium(tmp_path / "consortium")
    model = train_demo_model(consortium.development_path)
    spec = SITES[1]
    without = _site_data(spec, np.random.default_rng([2026, 2]), model)
    with_extras = _site_data(spec, np.random.default_rng([2026, 2]), model, np.random.default_rng([2026, 2, 1]))
    assert len(with_extras.columns) == len(without.columns) + 10 + 1  # further items, subtype
    pd.testing.assert_frame_equal(with_extras[list(without.columns)], without)


def _comparable(releases: list[dict]) -> list[dict]:
    """The releases without what differs between two runs of the demo by design: the coordinator's and sites'
    keys (new on every run) and what names or signs with them, and the request's id and time."""

    def clean(value: object) -> object:
        if isinstance(value, dict):
            return {k: clean(v) for k, v in value.items() if not re.search(RUN_FIELDS, k)}
        if isinstance(value, list):
            return [clean(v) for v in value]
        return value

    return [clean(release) for release in releases]  # type: ignore[misc]


RUN_FIELDS = r"sha256|key_id|signature|trusted_coordinator_keys|created_at|request_id"


@pytest.mark.skipif(platform.machine() not in ("x86_64", "AMD64"), reason="OpenBLAS kernel names are x86-64's")
def test_another_cpu_kernel_gives_the_same_releases(demo, tmp_path: Path) -> None:
    """The same records give the same release on every CPU: the demo again, its linear algebra on OpenBLAS's
    Sandybridge kernel (AVX, no AVX2: another kernel than any newer x86-64 machine's own), releases the same
    counts, withholds the same cells for the same reasons and derives the same figures. Before the audit chose
    its rows in a fixed order and formed its distances, 227 lines of the demo's releases differed between this
    kernel and SkylakeX's (docs/threat-model.md, section 7)."""
    root, _, _ = demo
    out = tmp_path / "out"
    script = (
        "import sys; from pathlib import Path; from simulations.demo import run_demo; "
        "run_demo(Path(sys.argv[1]), engine='offline')"
    )
    env = {**os.environ, "OPENBLAS_CORETYPE": "Sandybridge"}
    subprocess.run([sys.executable, "-c", script, str(out)], env=env, check=True, capture_output=True, timeout=600)
    here = json.loads((root / "results" / "releases.json").read_text())
    there = json.loads((out / "results" / "releases.json").read_text())
    assert len(here) == len(there) == len(SITES)
    assert _comparable(there) == _comparable(here)
