"""Writing the consortium to a folder: schema, development cohort, scorecard, every site's data and mapping."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .cohort import generate_cohort
from .model import long_scorecard, train_demo_model
from .schema import LONG_ITEMS, LONG_SCHEMA_TOML, OUTCOME, SCHEMA_TOML
from .site_exports import _site_data, mapping_toml
from .sites import SITES


@dataclass(frozen=True)
class SiteFiles:
    site_id: str
    setting: str
    data_path: Path
    mapping_path: Path  # the screening model's inputs
    n_records: int
    full_mapping_path: Path | None = None  # also the full-length instrument's items and the second reference
    second_reference: str | None = None  # "instrument", "rater" or None


@dataclass(frozen=True)
class Consortium:
    root: Path
    schema_path: Path
    development_path: Path
    sites: tuple[SiteFiles, ...]
    long_schema_path: Path | None = None
    long_scorecard_path: Path | None = None


def write_consortium(out_dir: Path, seed: int = 2026) -> Consortium:
    """Write the schema, the development cohort and every site's data and mapping file under ``out_dir``.

    Layout: ``schema.toml``, ``development.csv`` (3000 records, schema names and the further items,
    ``outcome`` 1/0, no missing values, prevalence 30%), ``long-schema.toml`` and ``long-scorecard.json`` (the
    full-length instrument's scoring rule), and per site ``sites/<site_id>/data.csv``, ``mapping.toml`` (the
    screening model's inputs) and ``mapping-full.toml`` (also the further items and the second reference).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    schema_path = out_dir / "schema.toml"
    schema_path.write_text(SCHEMA_TOML, encoding="utf-8")
    development = generate_cohort(
        np.random.default_rng([seed, 0]), 3000, 0.30, extra=np.random.default_rng([seed, 0, 1])
    )
    development = development[[*LONG_ITEMS, "age_months", "sex", "subtype", OUTCOME]]
    development_path = out_dir / "development.csv"
    development.to_csv(development_path, index=False, lineterminator="\n")
    long_schema_path = out_dir / "long-schema.toml"
    long_schema_path.write_text(LONG_SCHEMA_TOML, encoding="utf-8")
    long_scorecard_path = out_dir / "long-scorecard.json"
    long_scorecard_path.write_bytes(long_scorecard())
    model = train_demo_model(development_path)
    sites = []
    for index, spec in enumerate(SITES, start=1):
        local = _site_data(spec, np.random.default_rng([seed, index]), model, np.random.default_rng([seed, index, 1]))
        site_dir = out_dir / "sites" / spec.site_id
        site_dir.mkdir(parents=True, exist_ok=True)
        data_path = site_dir / "data.csv"
        local.to_csv(data_path, index=False, lineterminator="\n")
        mapping_path = site_dir / "mapping.toml"
        mapping_path.write_text(mapping_toml(spec), encoding="utf-8")
        full_mapping_path = site_dir / "mapping-full.toml"
        full_mapping_path.write_text(mapping_toml(spec, full=True), encoding="utf-8")
        second = (
            "instrument" if spec.local.second_instrument_column else "rater" if spec.local.second_rater_column else None
        )
        sites.append(
            SiteFiles(spec.site_id, spec.setting, data_path, mapping_path, len(local), full_mapping_path, second)
        )
    return Consortium(out_dir, schema_path, development_path, tuple(sites), long_schema_path, long_scorecard_path)
