"""Checks on the invented demo consortium: determinism, prevalence, the small site, mapping files."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from simulations.consortium import (
    FEATURES,
    ITEMS,
    LONG_ITEMS,
    LONG_THRESHOLD,
    MIN_CELL_SIZE,
    MODEL_FEATURES,
    SITES,
    SMALL_SITE_ID,
    THRESHOLD,
    Consortium,
    SiteFiles,
    generate_cohort,
    model_inputs,
    train_demo_model,
    write_consortium,
)

SPECS = {spec.site_id: spec for spec in SITES}


@pytest.fixture(scope="module")
def consortium(tmp_path_factory: pytest.TempPathFactory) -> Consortium:
    return write_consortium(tmp_path_factory.mktemp("consortium"), seed=2026)


def _read_mapping(site: SiteFiles) -> dict:
    with site.mapping_path.open("rb") as handle:
        return tomllib.load(handle)


def _to_schema_terms(site: SiteFiles) -> pd.DataFrame:
    """A minimal reading of docs/formats.md, independent of the generator: map, then drop invalid records."""
    mapping = _read_mapping(site)
    local = pd.read_csv(site.data_path, dtype=str, keep_default_na=False)
    missing = set(mapping.get("missing", ["", "NA", "."]))
    frame = pd.DataFrame(index=local.index)
    valid = pd.Series(True, index=local.index)
    for name in FEATURES:
        spec = mapping.get("features", {}).get(name, {})
        text = local[spec.get("column", name)]
        if name == "subtype":  # optional in the schema: a blank is scored as "none"
            frame[name] = text.map(spec.get("codes", {})).where(~text.isin(missing), "none")
            valid &= frame[name].notna()
            continue
        valid &= ~text.isin(missing)
        if name == "sex":
            frame[name] = text.map(spec.get("codes", {}))
            valid &= frame[name].notna()
            continue
        value = pd.to_numeric(text.where(~text.isin(missing)), errors="coerce") * spec.get("multiply", 1)
        whole = value.round()
        low, high = (0, 3) if name in ITEMS else (0, 240)
        valid &= ((value - whole).abs() <= 1e-9) & whole.between(low, high)
        frame[name] = whole
    outcome = mapping["outcome"]
    text = local[outcome["column"]]
    frame["outcome"] = np.where(text.isin(outcome["positive"]), 1, np.where(text.isin(outcome["negative"]), 0, -1))
    valid &= frame["outcome"] >= 0
    return frame[valid].astype({name: int for name in (*ITEMS, "age_months")})


def _binomial_interval(n: int, p: float, level: float = 0.999) -> tuple[int, int]:
    """Central interval [lo, hi] of Binomial(n, p) holding at least `level` of the probability."""
    k = np.arange(n + 1)
    log_pmf = np.array([math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1) for i in k])
    log_pmf += k * math.log(p) + (n - k) * math.log1p(-p)
    cdf = np.cumsum(np.exp(log_pmf))
    tail = (1 - level) / 2
    return int(np.searchsorted(cdf, tail)), int(np.searchsorted(cdf, 1 - tail))


def test_generation_is_deterministic_for_a_seed(tmp_path: Path) -> None:
    first = write_consortium(tmp_path / "a", seed=7)
    second = write_consortium(tmp_path / "b", seed=7)
    other = write_consortium(tmp_path / "c", seed=8)
    files = sorted(p.relative_to(first.root) for p in first.root.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(second.root) for p in second.root.rglob("*") if p.is_file())
    for relative in files:
        assert (first.root / relative).read_bytes() == (second.root / relative).read_bytes(), relative
    assert first.development_path.read_bytes() != other.development_path.read_bytes()
    assert first.sites[0].data_path.read_bytes() != other.sites[0].data_path.read_bytes()


def test_layout_and_record_counts(consortium: Consortium) -> None:
    assert consortium.schema_path.is_file()
    assert [site.site_id for site in consortium.sites] == [spec.site_id for spec in SITES]
    for site in consortium.sites:
        assert site.data_path == consortium.root / "sites" / site.site_id / "data.csv"
        assert len(pd.read_csv(site.data_path, dtype=str)) == site.n_records == SPECS[site.site_id].n_records
    development = pd.read_csv(consortium.development_path)
    assert list(development.columns) == [*LONG_ITEMS, "age_months", "sex", "subtype", "outcome"]
    assert len(development) == 3000 and not development.isna().any().any()
    low, high = _binomial_interval(3000, 0.30)
    assert low <= development["outcome"].sum() <= high


def test_schema_lists_the_thirteen_features_in_order(consortium: Consortium) -> None:
    schema = tomllib.loads(consortium.schema_path.read_text(encoding="utf-8"))
    features = schema["features"]
    assert [f["name"] for f in features] == list(FEATURES)
    assert all((f["type"], f["min"], f["max"]) == ("int", 0, 3) for f in features[:10])
    assert (features[10]["type"], features[10]["min"], features[10]["max"]) == ("int", 0, 240)
    assert features[11]["categories"] == ["female", "male"]
    assert features[12]["categories"] == ["none", "early_onset", "late_onset"]
    assert (features[12]["required"], features[12]["missing"]) == (False, "none")
    assert consortium.long_schema_path is not None
    long_schema = tomllib.loads(consortium.long_schema_path.read_text(encoding="utf-8"))
    assert [f["name"] for f in long_schema["features"]] == list(LONG_ITEMS)


def test_prevalence_per_site_within_binomial_interval(consortium: Consortium) -> None:
    for site in consortium.sites:
        frame = _to_schema_terms(site)
        low, high = _binomial_interval(len(frame), SPECS[site.site_id].prevalence)
        assert low <= frame["outcome"].sum() <= high, site.site_id


def test_settings_span_community_to_referral() -> None:
    prevalence = {spec.setting: spec.prevalence for spec in SITES}
    assert set(prevalence) == {"community", "primary care", "specialist", "referral"}
    assert min(spec.prevalence for spec in SITES) <= 0.06 and max(spec.prevalence for spec in SITES) >= 0.55
    assert len({spec.site_id for spec in SITES}) == len(SITES) == 8


def test_small_site_is_small_and_every_cell_needs_suppression(consortium: Consortium) -> None:
    (small,) = [site for site in consortium.sites if site.site_id == SMALL_SITE_ID]
    assert 25 <= small.n_records <= 40
    assert sorted(site.n_records for site in consortium.sites)[1] >= 300
    frame = _to_schema_terms(small)
    model = train_demo_model(consortium.development_path)
    positive = model.predict_proba(model_inputs(frame))[:, 1] >= THRESHOLD
    truth = frame["outcome"].to_numpy() == 1
    cells = [(positive & truth).sum(), (positive & ~truth).sum(), (~positive & truth).sum(), (~positive & ~truth).sum()]
    assert all(1 <= cell < MIN_CELL_SIZE for cell in cells), cells


def test_larger_sites_have_missing_answers_and_a_few_broken_records(consortium: Consortium) -> None:
    for site in consortium.sites:
        excluded = site.n_records - len(_to_schema_terms(site))
        assert 0 < excluded <= 0.08 * site.n_records + 2, site.site_id
        if site.site_id != SMALL_SITE_ID:
            local = pd.read_csv(site.data_path, dtype=str, keep_default_na=False)
            item_columns = [_read_mapping(site).get("features", {}).get(i, {}).get("column", i) for i in ITEMS]
            assert (local[item_columns] == "7").any().any(), site.site_id


def test_mapping_files_parse_and_name_existing_columns(consortium: Consortium) -> None:
    for site in consortium.sites:
        mapping = _read_mapping(site)
        header = pd.read_csv(site.data_path, nrows=0).columns
        assert "record_id" in header
        assert mapping["outcome"]["column"] in header
        for name in FEATURES:
            column = mapping.get("features", {}).get(name, {}).get("column", name)
            assert column in header, (site.site_id, name, column)
        assert set(mapping["features"]["sex"]["codes"].values()) == {"female", "male"}


def test_local_names_differ_between_sites(consortium: Consortium) -> None:
    item_names = set()
    for site in consortium.sites:
        mapping = _read_mapping(site)
        item_names.add(mapping.get("features", {}).get("item_01", {}).get("column", "item_01"))
    assert len(item_names) >= 4
    headers = {tuple(pd.read_csv(site.data_path, nrows=0).columns) for site in consortium.sites}
    assert len(headers) == len(consortium.sites)


def test_year_sites_round_trip_to_whole_months(consortium: Consortium) -> None:
    year_sites = [site for site in consortium.sites if SPECS[site.site_id].local.age_in_years]
    assert year_sites
    for site in year_sites:
        mapping = _read_mapping(site)["features"]["age_months"]
        assert mapping["multiply"] == 12
        months = pd.to_numeric(pd.read_csv(site.data_path, dtype=str)[mapping["column"]]) * 12
        assert (months - months.round()).abs().max() <= 1e-9


def test_development_model_discriminates_on_a_fresh_cohort(consortium: Consortium) -> None:
    model = train_demo_model(consortium.development_path)
    assert model.coef_.shape == (1, len(FEATURES))
    assert model.coef_[0, len(MODEL_FEATURES)] == 0.0  # subtype is in the schema only to split results by
    fresh = generate_cohort(np.random.default_rng(12345), 3000, 0.30)
    scores = model.predict_proba(model_inputs(fresh))[:, 1]
    assert roc_auc_score(fresh["outcome"], scores) > 0.75
    again = train_demo_model(consortium.development_path)
    assert np.array_equal(model.coef_, again.coef_)


def test_full_length_instrument_beats_the_short_form_on_a_fresh_cohort(consortium: Consortium) -> None:
    """The long form's points rule (sum of all twenty answers >= LONG_THRESHOLD) discriminates better than the
    short model, as a full-length instrument should; AUCs by scikit-learn's roc_auc_score."""
    model = train_demo_model(consortium.development_path)
    fresh = generate_cohort(np.random.default_rng(99), 3000, 0.30, extra=np.random.default_rng(100))
    long_points = fresh[list(LONG_ITEMS)].sum(axis=1)
    short_auc = roc_auc_score(fresh["outcome"], model.predict_proba(model_inputs(fresh))[:, 1])
    long_auc = roc_auc_score(fresh["outcome"], long_points)
    assert 0.02 < long_auc - short_auc < 0.1, (short_auc, long_auc)
    called = long_points >= LONG_THRESHOLD
    truth = fresh["outcome"] == 1
    assert 0.7 < called[truth].mean() < 0.95 and 0.9 < (~called[~truth]).mean() < 0.99


def test_second_references_and_subtype_as_each_site_writes_them(consortium: Consortium) -> None:
    """Three sites carry a second instrument (blank for about a quarter), two a second rater on about half the
    records; each full mapping names it as [reference2] with the site's own codes; the subtype is coded only
    for participants with the condition."""
    kinds = {}
    for site in consortium.sites:
        assert site.full_mapping_path is not None
        full = tomllib.loads(site.full_mapping_path.read_text())
        short = _read_mapping(site)
        assert "reference2" not in short and "item_11" not in short.get("features", {})
        local = pd.read_csv(site.data_path, dtype=str, keep_default_na=False)
        for item in LONG_ITEMS:
            assert full.get("features", {}).get(item, {}).get("column", item) in local.columns
        subtype = local[short["features"]["subtype"]["column"]]
        outcome = local[short["outcome"]["column"]]
        coded = subtype.isin(short["features"]["subtype"]["codes"])
        assert not coded[outcome.isin(short["outcome"]["negative"])].any(), site.site_id
        assert coded[outcome.isin(short["outcome"]["positive"])].mean() == 1.0, site.site_id
        kinds[site.site_id] = site.second_reference
        if site.second_reference is None:
            assert "reference2" not in full
            continue
        column = local[full["reference2"]["column"]]
        assert full["reference2"]["positive"] == short["outcome"]["positive"]
        known = column.isin(full["reference2"]["positive"] + full["reference2"]["negative"])
        share = known.mean()
        if site.second_reference == "rater":
            assert 0.4 < share < 0.6, (site.site_id, share)
        else:
            assert 0.68 < share < 0.82, (site.site_id, share)
        both = known & outcome.isin(short["outcome"]["positive"] + short["outcome"]["negative"])
        same = (column[both].isin(full["reference2"]["positive"])) == (outcome[both].isin(short["outcome"]["positive"]))
        assert 0.8 < same.mean() < 0.99, (site.site_id, same.mean())  # they mostly agree, not always
    assert sorted(k for k in kinds.values() if k) == ["instrument"] * 3 + ["rater"] * 2
