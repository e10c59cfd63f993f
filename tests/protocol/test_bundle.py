"""Model bundles: signature first, then every part checked; models score as their source library does."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.ensemble import GradientBoostingClassifier
from sklearn.linear_model import LogisticRegression

from federation.modelpack import bundle_from_sklearn, pack_model
from federation.protocol import (
    BundleError,
    BundleSignatureError,
    KeyRing,
    Schema,
    key_id,
    load_bundle,
    load_private_key,
    make_scorer,
    write_keypair,
)

SCHEMA = Schema.from_toml(
    '[[features]]\nname = "a"\ntype = "int"\nmin = 0\nmax = 3\n\n'
    '[[features]]\nname = "b"\ntype = "category"\ncategories = ["no", "yes"]\n\n'
    '[[features]]\nname = "c"\ntype = "float"\n',
    "schema",
)


@pytest.fixture
def key(tmp_path):
    private_path, _ = write_keypair(tmp_path, "coordinator")
    return load_private_key(private_path)


def ring(private_key) -> KeyRing:
    public = private_key.public_key()
    return KeyRing({key_id(public): public})


def scorecard(kind: str = "points") -> bytes:
    return json.dumps(
        {
            "format": "scorecard",
            "kind": kind,
            "intercept": -1.0,
            "points": {"a": {"0": 0, "1": 1, "2": 2, "3": 4}, "b": {"yes": 3}},
            "weights": {"c": 0.5},
        }
    ).encode()


def test_points_scorecard_scores_by_hand(key):
    bundle = load_bundle(pack_model(scorecard(), "scorecard", SCHEMA, key, [3.0]), ring(key))
    assert bundle.manifest.score_kind == "points"
    rows = np.array([[3, 1, 2.0], [0, 0, 0.0], [2, 0, -4.0]], dtype=np.float32)
    # by hand: -1 + 4 + 3 + 1 = 7; -1 + 0 + 0 + 0 = -1; -1 + 2 + 0 - 2 = -1
    assert make_scorer(bundle).score(rows).tolist() == [7.0, -1.0, -1.0]


def test_logistic_scorecard_is_a_probability(key):
    bundle = load_bundle(pack_model(scorecard("logistic"), "scorecard", SCHEMA, key, None), ring(key))
    assert bundle.manifest.score_kind == "probability" and bundle.threshold == 0.5
    score = make_scorer(bundle).score(np.array([[1, 1, 0.0]], dtype=np.float32))
    assert score[0] == pytest.approx(1 / (1 + np.exp(-(-1 + 1 + 3))))


def test_points_scorecard_needs_a_threshold(key):
    with pytest.raises(BundleError, match="needs --threshold"):
        pack_model(scorecard(), "scorecard", SCHEMA, key, None)


@pytest.mark.parametrize(
    "make_model",
    [lambda: LogisticRegression(max_iter=5000), lambda: GradientBoostingClassifier(n_estimators=20, random_state=0)],
)
def test_onnx_bundle_scores_like_scikit_learn(key, make_model):
    # Reference: scikit-learn's own predict_proba on its bundled breast-cancer data.
    data = load_breast_cancer()
    x = data.data[:, :5].astype(np.float32)
    model = make_model().fit(x, data.target)
    schema = Schema.from_dict({"features": [{"name": f"f{i}", "type": "float"} for i in range(5)]})
    bundle = load_bundle(bundle_from_sklearn(model, schema, key), ring(key))
    ours = make_scorer(bundle).score(x)
    np.testing.assert_allclose(ours, model.predict_proba(x)[:, 1], atol=1e-5)


def test_any_flipped_byte_is_refused(key):
    data = pack_model(scorecard(), "scorecard", SCHEMA, key, [3.0])
    header_end = data.index(b"\n", data.index(b"\n", data.index(b"\n") + 1) + 1)
    for position in range(header_end + 1, len(data), max(1, len(data) // 50)):
        tampered = bytearray(data)
        tampered[position] ^= 0x20
        with pytest.raises(BundleError):
            load_bundle(bytes(tampered), ring(key))


def test_unpinned_signer_is_refused_before_parsing(key, tmp_path):
    other_path, _ = write_keypair(tmp_path / "other", "coordinator")
    data = pack_model(scorecard(), "scorecard", SCHEMA, load_private_key(other_path), [3.0])
    with pytest.raises(BundleSignatureError, match="not pinned"):
        load_bundle(data, ring(key))


def test_not_a_bundle(key):
    with pytest.raises(BundleError, match="not a model bundle"):
        load_bundle(b"PK\x03\x04 a zip file", ring(key))


def test_packing_probes_a_record_inside_the_schema(key):
    """The packer scores one record inside the schema's domains: a points scorecard on a feature that starts
    at 1 (so 0 lies outside the attainable range 2..10) packs."""
    schema = Schema.from_dict({"features": [{"name": "a", "type": "float", "min": 1, "max": 5}]})
    card = {"format": "scorecard", "kind": "points", "intercept": 0, "weights": {"a": 2}}
    bundle = load_bundle(pack_model(json.dumps(card).encode(), "scorecard", schema, key, [3.0]), ring(key))
    scorer = make_scorer(bundle)
    assert (scorer.low, scorer.high) == (2.0, 10.0)  # 2 x [1, 5], by hand
    assert scorer.score(np.array([[1.0], [5.0]], dtype=np.float32)).tolist() == [2.0, 10.0]


@pytest.mark.parametrize(
    ("entry", "rule"),
    [
        ({"type": "int", "min": 0, "max": 95, "missing": -1}, "missing: must lie within the feature's min and max"),
        ({"type": "float", "min": 0, "max": 95, "missing": 500}, "missing: must lie within the feature's min and max"),
        ({"type": "int", "min": 0, "max": 95, "missing": 2.5}, "missing: an int feature.s missing value"),
    ],
)
def test_a_missing_value_outside_the_features_domain_is_refused(entry, rule):
    """Found by our red team: a fill of -1 months put records at an age the site's audit, which knows the
    schema's domain, takes as impossible. The schema names the field and the rule."""
    from federation.protocol import DocumentError

    with pytest.raises(DocumentError, match=rf"features\[0\]\.{rule}"):
        Schema.from_dict({"features": [{"name": "age_months", **entry}]})
    inside = {**entry, "missing": 0}
    assert Schema.from_dict({"features": [{"name": "age_months", **inside}]}).features[0].missing_value == 0


def test_bundle_show_says_what_a_sites_reviewer_sees(key, tmp_path, capsys):
    """Found by following the coordinator's guide ("Sites see exactly this"): `bundle show` left out the model's
    name, which inputs are optional and what a missing value is scored as, which `site-agent model review`
    shows and which every bundle of a study must declare alike."""
    from federation.cli import main as federation

    schema = Schema.from_dict(
        {
            "features": [
                {"name": "a", "type": "float", "min": 1, "max": 5},
                {"name": "b", "type": "int", "min": 0, "max": 3, "required": False, "missing": 0},
            ]
        }
    )
    card = {"format": "scorecard", "kind": "points", "intercept": 0, "weights": {"a": 2, "b": 1}}
    path = tmp_path / "m.bundle"
    path.write_bytes(pack_model(json.dumps(card).encode(), "scorecard", schema, key, [3.0], name="card-7"))
    capsys.readouterr()
    assert federation(["bundle", "show", str(path)]) == 0
    out = capsys.readouterr().out
    assert "name        card-7" in out
    assert "b                    int in [0.0, 3.0] (optional); a missing value is scored as 0" in out
