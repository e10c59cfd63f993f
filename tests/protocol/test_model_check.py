"""The static check of ONNX models (federation/protocol/model_check.py) and the scoring runtime's refusals.

External references: scikit-learn's bundled breast-cancer data (Wolberg et al., UCI) and scikit-learn's own
``predict_proba`` for the models skl2onnx exports; onnxruntime itself, run on the unchecked graph, to show
that each crafted graph the check refuses really does make one record's score depend on the others.
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime
import pytest
from onnx import TensorProto, helper, numpy_helper
from sklearn.datasets import load_breast_cancer
from sklearn.ensemble import GradientBoostingClassifier, HistGradientBoostingClassifier, RandomForestClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler, StandardScaler
from sklearn.tree import DecisionTreeClassifier

from federation.protocol import BundleError
from federation.protocol.errors import ScoringError
from federation.protocol.model_check import check_onnx
from federation.protocol.scoring import SCORING_FAILED, OnnxScorer

N_FEATURES = 6


def breast_cancer() -> tuple[np.ndarray, np.ndarray]:
    data = load_breast_cancer()
    return data.data[:, :N_FEATURES].astype(np.float32), data.target


def export(model: object, zipmap: bool) -> bytes:
    from skl2onnx import to_onnx
    from skl2onnx.common.data_types import FloatTensorType

    return to_onnx(
        model,
        initial_types=[("input", FloatTensorType([None, N_FEATURES]))],
        options={id(model): {"zipmap": zipmap}},
        target_opset={"": 17, "ai.onnx.ml": 3},
    ).SerializeToString()


CLASSIFIERS = {
    "logistic": lambda: make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000)),
    "tree": lambda: DecisionTreeClassifier(max_depth=4, random_state=0),
    "forest": lambda: RandomForestClassifier(n_estimators=10, max_depth=4, random_state=0),
    "boosting": lambda: GradientBoostingClassifier(n_estimators=10, random_state=0),
    "hist-boosting": lambda: HistGradientBoostingClassifier(max_iter=10, random_state=0),
    "mlp-relu": lambda: make_pipeline(MinMaxScaler(), MLPClassifier((8,), max_iter=2000, random_state=0)),
    "mlp-tanh": lambda: make_pipeline(MinMaxScaler(), MLPClassifier((6, 4), "tanh", max_iter=2000, random_state=0)),
}


@pytest.mark.parametrize("zipmap", [False, True])
@pytest.mark.parametrize("name", sorted(CLASSIFIERS))
def test_skl2onnx_classifiers_pass_and_score_each_record_alone(name: str, zipmap: bool) -> None:
    """Every linear, tree and MLP classifier skl2onnx exports passes; its scores match scikit-learn's
    predict_proba (reference) and are the same whether records are scored one by one or in one batch."""
    x, y = breast_cancer()
    model = CLASSIFIERS[name]().fit(x, y)
    scorer = OnnxScorer(export(model, zipmap), N_FEATURES)
    batch = scorer.score(x)
    np.testing.assert_allclose(batch, model.predict_proba(x)[:, 1], atol=1e-5)
    # onnxruntime's vectorised float32 kernels can round a record's last bit differently with its position in
    # the batch (2**-23 relative); anything more would mean the other records count.
    one_by_one = np.array([scorer.score(x[i : i + 1])[0] for i in range(0, len(x), 7)])
    np.testing.assert_allclose(one_by_one, batch[::7], rtol=0, atol=2e-7)
    reversed_batch = scorer.score(x[::-1].copy())[::-1]
    np.testing.assert_allclose(reversed_batch, batch, rtol=0, atol=2e-7)
    assert not any(op.endswith(":ZipMap") for op in scorer.operators)  # only the score's part of the graph runs


# --- crafted graphs that mix the batch ---------------------------------------------------------------------


def const(name: str, values: object, dtype: type = np.int64) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(values, dtype=dtype), name)


def graph_model(nodes: list, initializers: list, opset: int = 18, domains: tuple[str, ...] = ()) -> bytes:
    graph = helper.make_graph(
        nodes,
        "crafted",
        [helper.make_tensor_value_info("input", TensorProto.FLOAT, [None, N_FEATURES])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, 2])],
        initializer=initializers,
    )
    imports = [helper.make_opsetid("", opset)] + [helper.make_opsetid(d, 1) for d in domains]
    return helper.make_model(graph, opset_imports=imports).SerializeToString()


FIRST_COLUMN = [
    helper.make_node("Slice", ["input", "zero", "one", "one"], ["first"]),  # [N, 1]: the first feature
]
FIRST_COLUMN_CONSTANTS = [const("zero", [0]), const("one", [1])]


def as_probabilities(tensor: str) -> list:
    """[N, 1] -> [1 - sigmoid, sigmoid] along axis 1, the shape skl2onnx gives."""
    return [
        helper.make_node("Sigmoid", [tensor], ["p1"]),
        helper.make_node("Sub", ["unity", "p1"], ["p0"]),
        helper.make_node("Concat", ["p0", "p1"], ["probabilities"], axis=1),
    ]


UNITY = [numpy_helper.from_array(np.array(1.0, dtype=np.float32), "unity")]

MIXING = {
    # each record minus the batch mean: a record's score tells the mean of the others
    "mean over the batch": (
        [
            *FIRST_COLUMN,
            helper.make_node("ReduceMean", ["first", "zero"], ["mean"], keepdims=1),
            helper.make_node("Sub", ["first", "mean"], ["centred"]),
            *as_probabilities("centred"),
        ],
        "'ReduceMean' acts along the batch axis",
    ),
    "softmax across records": (
        [*FIRST_COLUMN, helper.make_node("Softmax", ["first"], ["share"], axis=0), *as_probabilities("share")],
        "'Softmax' along the batch axis",
    ),
    "records times records (Gram matrix)": (
        [
            *FIRST_COLUMN,
            helper.make_node("Transpose", ["first"], ["row"], perm=[1, 0]),
            helper.make_node("MatMul", ["first", "row"], ["gram"]),
            helper.make_node("ReduceSum", ["gram", "one"], ["total"], keepdims=1),
            *as_probabilities("total"),
        ],
        "'Transpose' must keep the batch axis first",
    ),
    "reshape across records": (
        [
            *FIRST_COLUMN,
            helper.make_node("Reshape", ["first", "pairs"], ["paired"]),
            helper.make_node("ReduceSum", ["paired", "one"], ["sums"], keepdims=0),
            helper.make_node("Reshape", ["sums", "column"], ["summed"]),
            *as_probabilities("summed"),
        ],
        "'Reshape' would move values between records",
    ),
    "cumulative sum over records": (
        [
            *FIRST_COLUMN,
            helper.make_node("CumSum", ["first", "zero_scalar"], ["running"]),
            *as_probabilities("running"),
        ],
        "'CumSum' is not on the site's list",
    ),
    "largest record (TopK)": (
        [
            *FIRST_COLUMN,
            helper.make_node("TopK", ["first", "one"], ["top", "where"], axis=0),
            helper.make_node("Sub", ["first", "top"], ["below_top"]),
            *as_probabilities("below_top"),
        ],
        "'TopK' is not on the site's list",
    ),
    "batch size (Shape)": (
        [
            *FIRST_COLUMN,
            helper.make_node("Shape", ["first"], ["shape"]),
            helper.make_node("Cast", ["shape"], ["shape_f"], to=TensorProto.FLOAT),
            helper.make_node("Slice", ["shape_f", "zero", "one"], ["n"]),
            helper.make_node("Mul", ["first", "n"], ["scaled"]),
            *as_probabilities("scaled"),
        ],
        "'Shape' is not on the site's list",
    ),
    "concatenated along records": (
        [
            *FIRST_COLUMN,
            helper.make_node("Concat", ["first", "first"], ["doubled"], axis=0),
            helper.make_node("Slice", ["doubled", "one", "big", "zero"], ["shifted"]),
            helper.make_node("Slice", ["shifted", "zero", "n_rows", "zero"], ["neighbour"]),
            *as_probabilities("neighbour"),
        ],
        "'Concat' along the batch axis",
    ),
    # Found by the red team: a Cast the check read as keeping its value. int64 2**32 cast to int32 is 0 at run
    # time, so the Slice takes record 0 and every score is "this record minus the first one".
    "records picked by an axis that wraps in a cast": (
        [
            *FIRST_COLUMN,
            helper.make_node("Cast", ["wrapping_axis"], ["axis_i32"], to=TensorProto.INT32),
            helper.make_node("Slice", ["first", "zero_i32", "one_i32", "axis_i32"], ["record0"]),
            helper.make_node("Sub", ["first", "record0"], ["against_first"]),
            *as_probabilities("against_first"),
        ],
        "'Slice': starts, ends and axes must be constants in the graph",
    ),
    # uint32 4294967294 cast to int32 is -2, axis 0 of a rank-2 tensor: step -1 gives record i the score of
    # record N-1-i
    "records reversed by an axis that wraps in a cast": (
        [
            *FIRST_COLUMN,
            helper.make_node("Cast", ["unsigned_axis"], ["axis_back"], to=TensorProto.INT32),
            helper.make_node(
                "Slice", ["first", "minus_one_i32", "lowest_i32", "axis_back", "minus_one_i32"], ["reversed"]
            ),
            *as_probabilities("reversed"),
        ],
        "'Slice': starts, ends and axes must be constants in the graph",
    ),
    "an axis cast from a NaN": (
        [
            helper.make_node("Cast", ["not_a_number"], ["nan_axis"], to=TensorProto.INT64),
            helper.make_node("Slice", ["input", "zero", "one", "nan_axis"], ["first"]),
            *as_probabilities("first"),
        ],
        "'Slice': starts, ends and axes must be constants in the graph",
    ),
    # onnxruntime refuses to load this one itself; the check must not lean on that
    "axes given twice (attribute over the batch, input elsewhere)": (
        [
            *FIRST_COLUMN,
            helper.make_node("ReduceSum", ["first", "one"], ["total"], keepdims=1, axes=[0]),
            *as_probabilities("total"),
        ],
        "'ReduceSum': axes given both as an attribute and as an input",
    ),
    "flatten at the last axis (one row per value, not per record)": (
        [
            helper.make_node("Flatten", ["input"], ["values"], axis=2),
            helper.make_node("Slice", ["values", "zero", "one", "one"], ["first"]),
            *as_probabilities("first"),
        ],
        "'Flatten' at an axis other than 1 would mix records",
    ),
    "a value defined twice (a node output over a constant)": (
        [
            helper.make_node("Identity", ["zero_i32"], ["one"]),
            *FIRST_COLUMN,
            *as_probabilities("first"),
        ],
        "'Identity': defines a value the graph already has",
    ),
}
MIXING_CONSTANTS = [
    *FIRST_COLUMN_CONSTANTS,
    *UNITY,
    const("wrapping_axis", [2**32]),
    const("unsigned_axis", [4294967294], np.uint32),
    const("zero_i32", [0], np.int32),
    const("one_i32", [1], np.int32),
    const("minus_one_i32", [-1], np.int32),
    const("lowest_i32", [-(2**31)], np.int32),
    const("not_a_number", [np.nan], np.float32),
    const("pairs", [-1, 2]),
    const("column", [-1, 1]),
    const("zero_scalar", 0),
    const("big", [1 << 30]),
    const("n_rows", [-1]),
]


@pytest.mark.parametrize("name", sorted(MIXING))
def test_graphs_that_mix_records_are_refused_before_any_record_is_read(name: str) -> None:
    nodes, rule = MIXING[name]
    used = {i for node in nodes for i in node.input}
    model = graph_model(nodes, [c for c in MIXING_CONSTANTS if c.name in used])
    with pytest.raises(BundleError, match=rf"refused before any record is read: operator {rule}"):
        check_onnx(model, N_FEATURES)


@pytest.mark.parametrize(
    "name",
    [
        "mean over the batch",
        "softmax across records",
        "cumulative sum over records",
        "batch size (Shape)",
        "records picked by an axis that wraps in a cast",
        "records reversed by an axis that wraps in a cast",
    ],
)
def test_the_refused_graphs_really_mix_records_when_run_unchecked(name: str) -> None:
    """The premise of the check: run directly in onnxruntime, these graphs give a record a different score
    in a batch than alone, so they could ask what else is in the data."""
    nodes, _ = MIXING[name]
    used = {i for node in nodes for i in node.input}
    session = onnxruntime.InferenceSession(
        graph_model(nodes, [c for c in MIXING_CONSTANTS if c.name in used]), providers=["CPUExecutionProvider"]
    )
    x = breast_cancer()[0][:20] / 100  # scaled so that the sigmoid does not flatten the differences
    batch = session.run(None, {"input": x})[0][:, 1]
    alone = np.array([session.run(None, {"input": x[i : i + 1]})[0][0, 1] for i in range(20)])
    assert np.abs(batch - alone).max() > 1e-3


def nested_graph_model(op: str) -> bytes:
    branch = helper.make_graph(
        [helper.make_node("Identity", ["input"], ["out"])],
        "branch",
        [],
        [helper.make_tensor_value_info("out", TensorProto.FLOAT, [None, N_FEATURES])],
    )
    node = helper.make_node("If", ["cond"], ["probabilities"], then_branch=branch, else_branch=branch)
    if op == "RandomUniformLike":
        node = helper.make_node("RandomUniformLike", ["pair"], ["probabilities"])
    nodes = [
        helper.make_node("Slice", ["input", "zero", "two", "one"], ["pair"]),
        helper.make_node("ReduceMax", ["pair"], ["top"], keepdims=0),
        helper.make_node("Greater", ["top", "unity"], ["cond"]),
        node,
    ]
    return graph_model(nodes, [const("zero", [0]), const("one", [1]), const("two", [2]), *UNITY])


@pytest.mark.parametrize(
    ("model", "rule"),
    [
        (lambda: nested_graph_model("If"), "'If' is not on the site's list"),
        (lambda: nested_graph_model("RandomUniformLike"), "'RandomUniformLike' is not on the site's list"),
        (
            lambda: graph_model(
                [helper.make_node("Send", ["input"], ["probabilities"], domain="com.example.exfiltrate")],
                [],
                domains=("com.example.exfiltrate",),
            ),
            "unsupported operator domain 'com.example.exfiltrate'",
        ),
        (
            lambda: graph_model(
                [
                    *FIRST_COLUMN,
                    helper.make_node("SequenceConstruct", ["first", "first"], ["parts"]),
                    helper.make_node("ConcatFromSequence", ["parts"], ["probabilities"], axis=1),
                ],
                FIRST_COLUMN_CONSTANTS,
            ),
            "'SequenceConstruct' is not on the site's list",
        ),
    ],
)
def test_control_flow_random_and_custom_operators_are_refused(model, rule: str) -> None:
    with pytest.raises(BundleError, match=rule):
        check_onnx(model(), N_FEATURES)


def test_a_tensor_stored_outside_the_model_is_refused() -> None:
    """External data would make onnxruntime read a file from the site's disk."""
    weights = numpy_helper.from_array(np.ones((N_FEATURES, 1), dtype=np.float32), "weights")
    onnx.external_data_helper.set_external_data(weights, location="../../etc/hostname")
    weights.ClearField("raw_data")
    nodes = [helper.make_node("MatMul", ["input", "weights"], ["logit"]), *as_probabilities("logit")]
    with pytest.raises(BundleError, match="stored outside the model"):
        check_onnx(graph_model(nodes, [weights, *UNITY]), N_FEATURES)


# --- failures while scoring ---------------------------------------------------------------------------------


def nan_below(threshold: float) -> bytes:
    """score = sigmoid(first feature / 10) + 0 * log(first feature - threshold): NaN for a record below it."""
    nodes = [
        *FIRST_COLUMN,
        helper.make_node("Sub", ["first", "threshold"], ["above"]),
        helper.make_node("Log", ["above"], ["log"]),
        helper.make_node("Mul", ["log", "nothing"], ["poison"]),
        helper.make_node("Mul", ["first", "tenth"], ["scaled"]),
        helper.make_node("Add", ["scaled", "poison"], ["logit"]),
        *as_probabilities("logit"),
    ]
    constants = [
        *FIRST_COLUMN_CONSTANTS,
        *UNITY,
        numpy_helper.from_array(np.array(threshold, dtype=np.float32), "threshold"),
        numpy_helper.from_array(np.array(0.0, dtype=np.float32), "nothing"),
        numpy_helper.from_array(np.array(0.1, dtype=np.float32), "tenth"),
    ]
    return graph_model(nodes, constants)


def test_a_failure_while_scoring_has_one_fixed_message_and_prints_nothing(capfd: pytest.CaptureFixture) -> None:
    """A graph that passes the static check but yields NaN for one record; and onnxruntime raising on input
    it cannot take. Both give the same fixed message; nothing reaches the terminal (onnxruntime's own log
    would name the node and can quote values)."""
    x, _ = breast_cancer()
    scorer = OnnxScorer(nan_below(10.0), N_FEATURES)
    clean = x[x[:, 0] > 10.5][:30]
    assert np.isfinite(scorer.score(clean)).all()
    poisoned = clean.copy()
    poisoned[17, 0] = 9.8125  # one record below the line
    with pytest.raises(ScoringError) as nan_failure:
        scorer.score(poisoned)
    with pytest.raises(ScoringError) as runtime_failure:
        scorer.score(poisoned[:, :4])  # onnxruntime raises InvalidArgument naming the shapes
    assert str(nan_failure.value) == str(runtime_failure.value) == SCORING_FAILED
    assert nan_failure.value.__cause__ is None and runtime_failure.value.__cause__ is None
    assert "9.8125" not in str(nan_failure.value)
    captured = capfd.readouterr()
    assert captured.out == "" and captured.err == ""


def test_a_probability_outside_zero_one_refuses() -> None:
    nodes = [*FIRST_COLUMN, helper.make_node("Concat", ["first", "first"], ["probabilities"], axis=1)]
    scorer = OnnxScorer(graph_model(nodes, FIRST_COLUMN_CONSTANTS), N_FEATURES)
    assert scorer.score(np.full((3, N_FEATURES), 0.25, dtype=np.float32)).tolist() == [0.25, 0.25, 0.25]
    with pytest.raises(ScoringError):
        scorer.score(np.full((3, N_FEATURES), 1.5, dtype=np.float32))
