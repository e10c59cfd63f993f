"""Refusals as an oracle: a coordinator signs a model that fails only when some group of records is present,
then reads the site's yes/no (release or refusal) as an answer about the data.

Played through the site's command line on data of the test's own making: a few hundred invented records,
with or without a small group of three infants under six months. What must hold:

- the refusal is the same fixed line whatever failed (a NaN, a score above 1) and whichever records;
- nothing of a record (not an age, not onnxruntime's message) reaches the terminal or the ledger;
- each refused request counts against the policy's caps, so probing stops at ``max_requests_per_study``
  per study and ``max_studies`` studies in all.
"""

from __future__ import annotations

import uuid
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import onnx
import pandas as pd
import pytest
from onnx import TensorProto, helper, numpy_helper

from federation.protocol import AnalysisSpec, Request, Schema, load_private_key, pack_bundle, sha256_hex, write_keypair
from site_agent import ledger
from site_agent.cli import main as site_agent

SCHEMA = Schema.from_dict(
    {
        "features": [
            {"name": "score_item", "type": "float", "min": 0, "max": 10},
            {"name": "age_months", "type": "int", "min": 0, "max": 240},
        ]
    }
)
INFANT_AGES = (3, 4, 5)  # the small group the coordinator asks about


def records(path: Path, with_infants: bool, seed: int = 11) -> Path:
    rng = np.random.default_rng(seed)
    n = 400
    frame = pd.DataFrame(
        {
            "score_item": np.round(rng.uniform(0, 10, n), 1),
            "age_months": rng.integers(24, 121, n),
            "outcome": rng.integers(0, 2, n),
        }
    )
    if with_infants:
        extra = pd.DataFrame({"score_item": [2.5, 7.5, 9.0], "age_months": INFANT_AGES, "outcome": [1, 1, 1]})
        frame = pd.concat([frame, extra], ignore_index=True)
    frame.to_csv(path, index=False)
    return path


def _const(name: str, value: object, dtype: type = np.float32) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(value, dtype=dtype), name)


def probing_model(kind: str, below: float) -> bytes:
    """An ONNX model whose score is sigmoid(score_item - 5) for everyone, except for records with
    age_months < ``below``: NaN (``kind="nan"``, through 0 * log(age - below)) or a "probability" above 1
    (``kind="above-one"``, through + relu(below - age)). Every operator is on the site's list: the graph
    passes the static check; only the records decide whether it fails."""
    nodes = [
        helper.make_node("Slice", ["input", "zero", "one", "one"], ["item"]),
        helper.make_node("Slice", ["input", "one", "two", "one"], ["age"]),
        helper.make_node("Sub", ["item", "five"], ["logit"]),
        helper.make_node("Sigmoid", ["logit"], ["p"]),
        helper.make_node("Sub", ["age", "below"], ["margin"]),
    ]
    if kind == "nan":
        nodes += [
            helper.make_node("Log", ["margin"], ["log"]),
            helper.make_node("Mul", ["log", "nothing"], ["poison"]),
            helper.make_node("Add", ["p", "poison"], ["p1"]),
        ]
    else:
        nodes += [
            helper.make_node("Neg", ["margin"], ["under"]),
            helper.make_node("Relu", ["under"], ["excess"]),
            helper.make_node("Add", ["p", "excess"], ["p1"]),
        ]
    nodes += [
        helper.make_node("Sub", ["unity", "p1"], ["p0"]),
        helper.make_node("Concat", ["p0", "p1"], ["probabilities"], axis=1),
    ]
    constants = [
        _const("zero", [0], np.int64),
        _const("one", [1], np.int64),
        _const("two", [2], np.int64),
        _const("five", 5.0),
        _const("below", below),
        _const("nothing", 0.0),
        _const("unity", 1.0),
    ]
    graph = helper.make_graph(
        nodes,
        "probe",
        [helper.make_tensor_value_info("input", TensorProto.FLOAT, [None, 2])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, 2])],
        initializer=constants,
    )
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)]).SerializeToString()


class Attacker:
    """The coordinator: it holds the key the site pinned, so it signs any model and any request."""

    def __init__(self, root: Path) -> None:
        key_path, self.pub = write_keypair(root / "coordinator", "coordinator")
        self.key = load_private_key(key_path)
        self.root = root

    def bundle(self, kind: str, below: float) -> Path:
        data = pack_bundle(
            model_bytes=probing_model(kind, below),
            model_format="onnx",
            schema=SCHEMA,
            score_kind="probability",
            thresholds=[0.5],
            private_key=self.key,
        )
        path = self.root / f"{kind}-{below}-{uuid.uuid4().hex[:6]}.bundle"
        path.write_bytes(data)
        return path

    def request(self, bundle: Path, study: str) -> Path:
        document = Request(
            study_id=study,
            request_id=uuid.uuid4().hex[:12],
            bundle_sha256=sha256_hex(bundle.read_bytes()),
            analyses=(AnalysisSpec("confusion"),),
            issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
        ).signed_bytes(self.key)
        path = self.root / f"request-{uuid.uuid4().hex[:8]}.json"
        path.write_bytes(document)
        return path


def make_site(attacker: Attacker, root: Path, **policy: object) -> Path:
    site = root / "site"
    assert site_agent(["init", "--site-id", "clinic-x", "--trust", str(attacker.pub), "--site-dir", str(site)]) == 0
    text = (site / "site.toml").read_text()
    for name, value in policy.items():
        line = next(line for line in text.splitlines() if line.startswith(f"{name} ="))
        text = text.replace(line, f"{name} = {str(value).lower()}")
    (site / "site.toml").write_text(text)
    return site


def run(site: Path, request: Path, bundle: Path, data: Path, capsys: pytest.CaptureFixture) -> tuple[int, str]:
    out = site.parent / f"release-{uuid.uuid4().hex[:8]}.json"
    code = site_agent(
        ["run", "--site-dir", str(site), "--request", str(request), "--bundle", str(bundle), "--data", str(data)]
        + ["--out", str(out)]
    )
    captured = capsys.readouterr()
    return code, captured.err


def sent_reasons(site: Path) -> list[str]:
    return [e["details"]["reason"] for e in ledger.read_entries(site / "ledger.jsonl") if e["event"] == "refusal"]


def test_a_model_failing_on_a_small_group_gets_one_fixed_reason_and_every_probe_counts(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    attacker = Attacker(tmp_path)
    # The worst case: a site that turned model approval off, so that only the caps bound the probing.
    site = make_site(attacker, tmp_path, max_requests_per_study=3, max_studies=2, require_model_approval=False)
    without = records(tmp_path / "without.csv", with_infants=False)
    with_group = records(tmp_path / "with.csv", with_infants=True)

    # Probe 1: "is anyone under six months?" on data without infants: the model scores everyone; released.
    nan_model = attacker.bundle("nan", 6.0)
    code, err = run(site, attacker.request(nan_model, "probe"), nan_model, without, capsys)
    assert code == 0 and err == ""

    # Probes 2 and 3: the same question, two ways of failing, on data with the three infants.
    lines = []
    for kind in ("nan", "above-one"):
        model = attacker.bundle(kind, 6.0)
        code, err = run(site, attacker.request(model, "probe"), model, with_group, capsys)
        assert code == 2
        lines.append(err.strip())
    assert lines[0] == lines[1]  # the same line, whatever failed
    assert len(lines[0].splitlines()) == 1
    assert lines[0].endswith("(tell the coordinator only: scoring failed)")
    assert sent_reasons(site) == ["scoring failed", "scoring failed"]
    refusal_entries = [e for e in ledger.read_entries(site / "ledger.jsonl") if e["event"] == "refusal"]
    for line in (*lines, *(str(e["details"]) for e in refusal_entries)):
        assert "onnxruntime" not in line.lower().replace("onnxruntime's message", "")
        assert "age_months" not in line and "Log" not in line

    # Probe 4, even an honest request, meets the cap: the two refusals counted like answers.
    honest = attacker.bundle("nan", -1.0)  # no record is below -1 month: this model never fails
    code, err = run(site, attacker.request(honest, "probe"), honest, without, capsys)
    assert code == 2 and "maximum number of requests for this study" in err
    assert sent_reasons(site)[-1].startswith("limit reached: ")

    # A new study id opens a second scope; its refusal counts towards max_studies = 2 ...
    model = attacker.bundle("above-one", 6.0)
    code, err = run(site, attacker.request(model, "probe-2"), model, with_group, capsys)
    assert code == 2 and err.strip() == lines[0]
    # ... so a third study is refused before any record is read.
    code, err = run(site, attacker.request(honest, "probe-3"), honest, without, capsys)
    assert code == 2 and "maximum number of studies" in err
    assert [r.split(":")[0] for r in sent_reasons(site)] == [
        "scoring failed",
        "scoring failed",
        "limit reached",
        "scoring failed",
        "limit reached",
    ]
    counted = ledger.counted_requests(site / "ledger.jsonl", None)
    assert sorted({c["study_id"] for c in counted.values()}) == ["probe", "probe-2"]
    assert len(counted) == 4  # every verified request, released or refused (a refusal by the cap adds nothing)


def test_the_refusal_reads_the_same_whichever_records_trigger_it(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    """Different infants (other ages, other records), the same request: byte-identical terminal line and
    ledger reason; the only thing the coordinator learns is that scoring failed."""
    attacker = Attacker(tmp_path)
    lines, reasons = [], []
    for seed in (1, 2):
        root = tmp_path / f"run{seed}"
        root.mkdir()
        site = make_site(attacker, root, require_model_approval=False)
        data = records(root / "data.csv", with_infants=True, seed=seed)
        model = attacker.bundle("nan", 6.0 + seed)  # a different threshold, different records below it
        code, err = run(site, attacker.request(model, "probe"), model, data, capsys)
        assert code == 2
        lines.append(err)
        reasons.append(sent_reasons(site))
        entry = [e for e in ledger.read_entries(site / "ledger.jsonl") if e["event"] == "refusal"][-1]
        assert entry["details"]["study_id"] == "probe" and entry["details"]["error"] == "ScoringError"
        assert set(entry["details"]) == {
            "request_sha256",
            "reason",
            "error",
            "detail",
            "study_id",
            "request_id",
            "coordinator_key_id",
        }
    assert lines[0] == lines[1] and reasons[0] == reasons[1] == ["scoring failed"]


def test_a_refusal_for_changed_records_names_no_count(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    """Found by our red team: when the records behind a count changed since an earlier release, the audit
    refused with a reason naming the count that differs (``subgroups.sex[1].confusion[0].tp``), which told the
    coordinator the sex and outcome of the records that changed. Two sites, each asked twice for the 2x2
    table by sex, each given one record more before the second request (a boy with the condition at one, a
    girl without it at the other): the same fixed line travels from both, and no count's name."""
    from site_agent.audit.facts import VALUES_REFUSED

    from .world import World
    from .world import records as world_records

    reasons = []
    for name, added in (("boy", (40, "m", 1, 1)), ("girl", (50, "f", 0, 0))):
        world = World(tmp_path / name, world_records())
        world.scorecard("items", {"kind": "points", "points": {"item": {"2": 1, "3": 1}}}, 1, lambda a, s, i: i >= 2)
        assert world.ask("items", "one", "--analyses", "confusion,subgroups", "--subgroup", "sex") is not None
        with (world.root / "records.csv").open("a") as data:
            data.write(",".join(str(v) for v in added) + "\n")
        capsys.readouterr()
        assert world.ask("items", "two", "--analyses", "confusion,subgroups", "--subgroup", "sex") is None
        reasons.append(sent_reasons(world.site)[-1])
        # offline, the terminal gives the line to pass on (found by following the site-IT guide: it printed the
        # site's own message alone, which names the count)
        assert f"(tell the coordinator only: {reasons[-1]})" in capsys.readouterr().err
        detail = [e for e in ledger.read_entries(world.site / "ledger.jsonl") if e["event"] == "refusal"][-1]
        assert "differs from the same count" in detail["details"]["detail"]  # the site's own record says which
    assert reasons[0] == reasons[1] == f"release withheld by the site's disclosure control: {VALUES_REFUSED}"
