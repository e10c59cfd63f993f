"""A validation study built on scikit-learn's bundled breast-cancer data (Wolberg et al., UCI), split
into a development part and three validation "sites". The data ship with scikit-learn, so the checks
built on it compare the tool against an open dataset and scikit-learn's own metrics."""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from federation.modelpack import bundle_from_sklearn
from federation.protocol import Schema, load_private_key, write_keypair

N_SITES = 3


def column_names() -> list[str]:
    names = load_breast_cancer().feature_names
    return [re.sub(r"[^A-Za-z0-9]+", "_", str(n)).strip("_") for n in names]


@dataclass(frozen=True)
class Study:
    root: Path
    coordinator_key: Path
    coordinator_pub: Path
    schema_path: Path
    bundle_path: Path
    site_csvs: tuple[Path, ...]
    model: object
    features: np.ndarray  # validation records, all sites, in site order
    outcome: np.ndarray


def build(root: Path, threshold: float = 0.5) -> Study:
    """Development on 40% of the records, then three sites of the rest (fixed seed)."""
    data = load_breast_cancer()
    # scikit-learn codes malignant as 0; the condition screened for here is malignancy, so outcome = 1 - target.
    x, y = data.data.astype(np.float32), 1 - data.target
    order = np.random.default_rng(7).permutation(len(y))
    dev, val = order[: int(0.4 * len(y))], order[int(0.4 * len(y)) :]
    # A deliberately small model (first 4 features) so every site has errors of both kinds.
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000)).fit(x[dev][:, :4], y[dev])
    names = column_names()[:4]
    schema_text = "".join(f'[[features]]\nname = "{n}"\ntype = "float"\nmin = 0\n\n' for n in names)
    root.mkdir(parents=True, exist_ok=True)
    schema_path = root / "schema.toml"
    schema_path.write_text(schema_text)
    key, pub = write_keypair(root / "coordinator", "coordinator")
    bundle = bundle_from_sklearn(model, Schema.from_toml(schema_text, "schema"), load_private_key(key), threshold)
    bundle_path = root / "model.bundle"
    bundle_path.write_bytes(bundle)
    site_csvs = []
    for i, part in enumerate(np.array_split(val, N_SITES)):
        frame = pd.DataFrame(x[part][:, :4], columns=names)
        frame["outcome"] = y[part]
        path = root / f"site{i}.csv"
        frame.to_csv(path, index=False)
        site_csvs.append(path)
    return Study(root, key, pub, schema_path, bundle_path, tuple(site_csvs), model, x[val][:, :4], y[val])
