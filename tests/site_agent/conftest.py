"""Fixtures: scikit-learn's bundled breast-cancer records (Wolberg et al., UCI) as one site's data in every
source format, two frozen models packed with federation.modelpack, and a real PostgreSQL server."""

from __future__ import annotations

import re
import sqlite3
import uuid
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import onnxruntime
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.tree import DecisionTreeClassifier

from federation.modelpack import bundle_from_sklearn, onnx_from_sklearn
from federation.protocol import AnalysisSpec, Request, Schema, load_private_key, sha256_hex, write_keypair
from site_agent.config import Site, init_site, load_site

from .postgres import PostgresServer

N_COMPARE_FEATURES = 4


@dataclass(frozen=True)
class Cancer:
    root: Path
    key: object  # coordinator private key
    pub: Path
    frame: pd.DataFrame  # the site's records, local column names
    features: np.ndarray  # float32 model inputs (30 columns)
    outcome: np.ndarray  # 1 = malignant
    second: np.ndarray  # a second reading (shallow tree's call), 1 = malignant
    schema_text: str
    bundle: bytes
    compare_bundle: bytes
    scores: np.ndarray  # onnxruntime's own scores of the model (reference)
    compare_scores: np.ndarray
    mapping: Path
    csv: Path
    parquet: Path
    sqlite: Path
    model: object  # the fitted scikit-learn pipeline inside ``bundle``

    @property
    def bundle_sha256(self) -> str:
        return sha256_hex(self.bundle)


def schema_names() -> list[str]:
    return [re.sub(r"[^A-Za-z0-9]+", "_", str(n)).strip("_") for n in load_breast_cancer().feature_names]


def onnx_scores(model: object, x: np.ndarray) -> np.ndarray:
    """The positive-class probability straight from onnxruntime (independent of the agent's scorer)."""
    session = onnxruntime.InferenceSession(onnx_from_sklearn(model, x.shape[1]), providers=["CPUExecutionProvider"])
    (probabilities,) = session.run(["probabilities"], {session.get_inputs()[0].name: x.astype(np.float32)})
    return np.asarray(probabilities, dtype=np.float64)[:, 1]


def mapping_text(local: list[str], names: list[str]) -> str:
    lines = ['missing = ["", "NA"]', "", "[outcome]", 'column = "diagnosis"', 'positive = ["M"]', 'negative = ["B"]']
    lines += ["", "[reference2]", 'column = "second_reading"', 'positive = ["M"]', 'negative = ["B"]']
    lines += ["", "[id]", 'column = "record_id"', ""]
    for column, name in zip(local, names, strict=True):
        lines += [f"[features.{name}]", f'column = "{column}"', ""]
    return "\n".join(lines)


@pytest.fixture(scope="session")
def cancer(tmp_path_factory: pytest.TempPathFactory) -> Cancer:
    root = tmp_path_factory.mktemp("cancer")
    data = load_breast_cancer()
    # scikit-learn codes malignant as 0; the condition here is malignancy, so outcome = 1 - target.
    x, y = data.data.astype(np.float32), (1 - data.target).astype(np.int64)
    names = schema_names()
    local = [str(n) for n in data.feature_names]  # the site's own column names, with spaces
    key_path, pub = write_keypair(root / "coordinator", "coordinator")
    key = load_private_key(key_path)
    schema_text = "".join(f'[[features]]\nname = "{n}"\ntype = "float"\nmin = 0\n\n' for n in names)
    compare_text = "".join(
        f'[[features]]\nname = "{n}"\ntype = "float"\nmin = 0\n\n' for n in names[:N_COMPARE_FEATURES]
    )
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=5000)).fit(x, y)
    small = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(x[:, :N_COMPARE_FEATURES], y)
    bundle = bundle_from_sklearn(model, Schema.from_toml(schema_text, "schema"), key, 0.5, "full")
    compare = bundle_from_sklearn(small, Schema.from_toml(compare_text, "schema"), key, 0.5, "four-features")
    tree = DecisionTreeClassifier(max_depth=2, random_state=0).fit(x[:, 20:], y)
    second = tree.predict(x[:, 20:]).astype(np.int64)
    frame = pd.DataFrame(x.astype(np.float64), columns=local)
    frame.insert(0, "record_id", [f"R{i:04d}" for i in range(len(y))])
    frame["diagnosis"] = np.where(y == 1, "M", "B")
    frame["second_reading"] = np.where(second == 1, "M", "B")
    csv = root / "records.csv"
    frame.to_csv(csv, index=False)
    parquet = root / "records.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), parquet, row_group_size=100)
    sqlite = root / "records.db"
    with sqlite3.connect(sqlite) as connection:
        frame.to_sql("records", connection, index=False)
    mapping = root / "mapping.toml"
    mapping.write_text(mapping_text(local, names))
    return Cancer(
        root,
        key,
        pub,
        frame,
        x,
        y,
        second,
        schema_text,
        bundle,
        compare,
        onnx_scores(model, x),
        onnx_scores(small, x[:, :N_COMPARE_FEATURES]),
        mapping,
        csv,
        parquet,
        sqlite,
        model,
    )


@pytest.fixture(scope="session")
def postgres(cancer: Cancer) -> PostgresServer:
    """A real server on loopback holding the same records in table ``records`` (columns as in the CSV)."""
    import psycopg

    server = PostgresServer()
    try:
        with psycopg.connect(server.dsn, autocommit=True) as connection:
            columns = ", ".join(
                f'"{c}" double precision' if c not in ("record_id", "diagnosis", "second_reading") else f'"{c}" text'
                for c in cancer.frame.columns
            )
            connection.execute(f"CREATE TABLE records ({columns})")
            connection.execute("CREATE SEQUENCE counter")
            with connection.cursor().copy("COPY records FROM STDIN WITH (FORMAT csv, HEADER true)") as copy:
                copy.write(cancer.csv.read_bytes())
        yield server
    finally:
        server.stop()


def make_site(root: Path, coordinator_pub: Path, min_cell_size: int = 1, **policy: object) -> Site:
    """A site folder pinning the coordinator key, with the given policy settings (model approval off unless
    asked for: these tests pack their own models; test_model_approval.py plays the approval)."""
    policy = {"require_model_approval": False, **policy}
    folder = init_site(root / f"site-{uuid.uuid4().hex[:8]}", "site-a", [coordinator_pub])
    text = (folder / "site.toml").read_text()
    text = text.replace("min_cell_size = 10", f"min_cell_size = {min_cell_size}")
    for setting, value in policy.items():
        rendered = "[" + ", ".join(f'"{v}"' for v in value) + "]" if isinstance(value, list) else str(value).lower()
        text, count = re.subn(rf"(?m)^{setting} = .*$", f"{setting} = {rendered}", text)
        assert count == 1, setting
    (folder / "site.toml").write_text(text)
    return load_site(folder)


def request_bytes(cancer: Cancer, *analyses: AnalysisSpec, study: str = "bc") -> bytes:
    request = Request(
        study_id=study,
        request_id=uuid.uuid4().hex,
        bundle_sha256=cancer.bundle_sha256,
        analyses=tuple(analyses),
        issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
    )
    return request.signed_bytes(cancer.key)
