"""The static check of an ONNX model, made before any record is read.

A site runs a coordinator's graph on its records. Two things must hold whatever the graph's author intended:

1. **Each record's score depends on that record alone.** A graph that sums over the batch, sorts it, takes
   its size or shape, or loops over it could make one record's score (or a failure) depend on the others,
   turning scoring into a question about the data. The check proves row independence by propagating a
   *batch axis* through the graph: the input's axis 0 is the batch; every operator that touches a batched
   value must be on an allowlist, with attributes that keep axis 0 as the batch and never combine two
   positions along it. Constants (initializers, ``Constant`` nodes and anything computed from constants
   only) carry no record.
2. **Nothing runs but what the score needs.** The graph is cut down to the ancestors of the score output
   (a label branch, a ``ZipMap`` and anything else are dropped) and onnxruntime runs only that part.

The allowlist holds what scikit-learn's linear, tree and MLP classifiers use once exported by skl2onnx
(``Scaler``, ``LinearClassifier``, ``TreeEnsembleClassifier``, ``MatMul``, ``Add``, ``Relu``, ``Sigmoid``,
``Concat`` along the feature axis, ...) and close per-element relatives. Not on it, so refused: control flow
(``If``, ``Loop``, ``Scan``), sequences and maps, random generators, ``TopK``/sorting, ``Shape``/``Size``,
``NonZero``, ``CumSum``, dropout, any custom domain or local function, subgraph attributes, and tensors
stored outside the model (external data, which onnxruntime would read from the site's disk).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .errors import BundleError

ALLOWED_DOMAINS = frozenset({"", "ai.onnx", "ai.onnx.ml"})

# Per-element operators: each output element depends on the elements at the same (broadcast) position.
UNARY = frozenset(
    {
        "Identity", "Cast", "Relu", "Sigmoid", "Tanh", "Exp", "Log", "Abs", "Neg", "Sqrt", "Reciprocal", "Floor",
        "Ceil", "Round", "Erf", "Softplus", "Softsign", "Sign", "Not", "IsNaN", "IsInf", "LeakyRelu", "Elu",
        "Selu", "HardSigmoid", "ThresholdedRelu",
    }
)  # fmt: skip
BROADCAST = frozenset(
    {
        "Add", "Sub", "Mul", "Div", "Pow", "Max", "Min", "Sum", "Mean", "Equal", "Less", "Greater", "LessOrEqual",
        "GreaterOrEqual", "And", "Or", "Xor", "Where", "PRelu", "Clip",
    }
)  # fmt: skip
FLOAT_ONLY = frozenset({"Div", "Pow"})  # integer division by zero is not a defined number
# ai.onnx.ml operators that treat each row of a [N, C] input on its own (ONNX-ML operator documentation).
ROW_WISE_ML = {
    "Scaler": (2,),
    "Normalizer": (2,),
    "Binarizer": (2,),
    "Imputer": (2,),
    "LinearClassifier": (1, 2),  # labels [N], scores [N, E]
    "LinearRegressor": (2,),
    "TreeEnsembleClassifier": (1, 2),
    "TreeEnsembleRegressor": (2,),
}
SHAPED = frozenset(
    {"MatMul", "Gemm", "Concat", "Softmax", "LogSoftmax", "Hardmax", "ArgMax", "ArgMin", "Reshape", "Flatten",
     "Squeeze", "Unsqueeze", "Transpose", "Gather", "Slice", "ReduceSum", "ReduceMean", "ReduceMax", "ReduceMin",
     "ReduceProd", "ReduceL1", "ReduceL2", "ReduceLogSumExp", "ReduceSumSquare", "Constant"}
)  # fmt: skip
ALLOWED_OPERATORS = UNARY | BROADCAST | SHAPED | frozenset(ROW_WISE_ML) | {"ZipMap"}
_FLOAT_TYPES = frozenset({1, 10, 11, 16})  # FLOAT, FLOAT16, DOUBLE, BFLOAT16 (onnx.TensorProto)


@dataclass(frozen=True)
class CheckedGraph:
    """A graph that passed the check: the part that computes the score, ready for onnxruntime."""

    model_bytes: bytes  # the pruned model (ancestors of the score output only)
    output: str  # a float tensor [N, 2]; column 1 is the score
    operators: tuple[str, ...]  # sorted "domain:op" names of the pruned graph, for a person to review


class _Refused(Exception):
    pass


def check_onnx(model_bytes: bytes, n_features: int) -> CheckedGraph:
    """Check an ONNX model statically and return the part of it that computes the score.

    Raises
    ------
    BundleError
        One line naming the rule the graph breaks (an operator, an attribute, a shape); never a value.
    """
    import onnx

    try:
        model = onnx.load_model_from_string(model_bytes)
    except Exception:  # onnx raises several types for malformed protobuf
        raise BundleError("model part is not a readable ONNX model") from None
    try:
        return _check(model, n_features)
    except _Refused as exc:
        raise BundleError(f"ONNX model refused before any record is read: {exc}") from None
    except BundleError:
        raise
    except Exception:  # a graph the check cannot follow (a value it cannot read as an axis or a shape)
        raise BundleError("ONNX model refused before any record is read: the check cannot follow its graph") from None


def _check(model: Any, n_features: int) -> CheckedGraph:
    import onnx
    from onnx import TensorProto, helper

    domains = {op.domain for op in model.opset_import} | {node.domain for node in model.graph.node}
    unsupported = sorted(d for d in domains if d not in ALLOWED_DOMAINS)
    if unsupported:
        raise BundleError(f"ONNX model uses unsupported operator domain {unsupported[0]!r}")
    if len(model.functions):
        raise _Refused("the model defines its own functions (only standard operators are run)")
    if len(model.training_info):
        raise _Refused("the model carries training steps")
    graph = model.graph
    if len(graph.sparse_initializer):
        raise _Refused("sparse initializers are not accepted")
    for tensor in graph.initializer:
        if tensor.data_location == TensorProto.EXTERNAL or len(tensor.external_data):
            raise _Refused("a tensor is stored outside the model (external data is not read)")
    constants = {t.name for t in graph.initializer}
    inputs = [i for i in graph.input if i.name not in constants]
    if len(inputs) != 1:
        raise BundleError("ONNX model must have exactly one input (float32 [N, n_features])")
    graph_input = inputs[0]
    shape = _declared_shape(graph_input.type)
    if graph_input.type.tensor_type.elem_type != TensorProto.FLOAT or shape is None or len(shape) != 2:
        raise _Refused("the input must be a float32 tensor [N, n_features]")
    if isinstance(shape[1], int) and shape[1] != n_features:
        raise BundleError(f"ONNX model expects {shape[1]} inputs but the schema has {n_features}")
    if isinstance(shape[0], int) and shape[0] != 0:
        raise _Refused("the input's first axis must be the batch (of any size), not a fixed number")

    producers = {out: node for node in graph.node for out in node.output if out}
    output, zipmap = _score_output(graph, producers)
    needed = _ancestors(output, producers)
    nodes = [node for node in graph.node if id(node) in needed]
    for node in nodes:
        if node.domain not in ("", "ai.onnx", "ai.onnx.ml") or node.op_type not in ALLOWED_OPERATORS:
            raise _Refused(f"operator {node.op_type!r} is not on the site's list of operators")
        for attribute in node.attribute:
            if attribute.type in (onnx.AttributeProto.GRAPH, onnx.AttributeProto.GRAPHS):
                raise _Refused(f"operator {node.op_type!r} carries a subgraph")
            if attribute.type in (onnx.AttributeProto.TENSOR, onnx.AttributeProto.TENSORS):
                tensors = [attribute.t] if attribute.type == onnx.AttributeProto.TENSOR else list(attribute.tensors)
                if any(t.data_location == TensorProto.EXTERNAL for t in tensors):
                    raise _Refused("a tensor is stored outside the model (external data is not read)")
    used = {name for node in nodes for name in node.input}
    pruned_graph = helper.make_graph(
        nodes,
        graph.name or "score",
        [helper.make_tensor_value_info(graph_input.name, TensorProto.FLOAT, ["N", shape[1]])],
        [helper.make_tensor_value_info(output, TensorProto.FLOAT, ["N", 2])],
        initializer=[t for t in graph.initializer if t.name in used],
    )
    pruned = helper.make_model(pruned_graph, opset_imports=list(model.opset_import))
    pruned.ir_version = model.ir_version
    try:
        inferred = onnx.shape_inference.infer_shapes(pruned)
    except Exception:  # onnx raises InferenceError and others for an inconsistent graph
        raise _Refused("the graph's shapes and types are inconsistent") from None
    _prove_row_independence(inferred, graph_input.name, output)
    if zipmap is not None:
        labels = [int(v) for a in zipmap.attribute if a.name == "classlabels_int64s" for v in a.ints]
        if labels != [0, 1]:
            raise _Refused("a ZipMap output must label its columns 0 and 1")
    operators = tuple(sorted({f"{n.domain or 'ai.onnx'}:{n.op_type}" for n in nodes}))
    return CheckedGraph(pruned.SerializeToString(), output, operators)


def _declared_shape(value_type: Any) -> list[int | str] | None:
    if not value_type.HasField("tensor_type") or not value_type.tensor_type.HasField("shape"):
        return None
    return [d.dim_value if d.HasField("dim_value") else (d.dim_param or "?") for d in value_type.tensor_type.shape.dim]


def _score_output(graph: Any, producers: dict[str, Any]) -> tuple[str, Any]:
    """The tensor holding [P(class 0), P(class 1)]: ``probabilities``, else the second output, else the only one.

    A ``ZipMap`` output (a sequence of maps) is replaced by the tensor the ZipMap reads.
    """
    names = [o.name for o in graph.output]
    if not names:
        raise _Refused("the model has no output")
    chosen = "probabilities" if "probabilities" in names else names[min(1, len(names) - 1)]
    declared = next(o for o in graph.output if o.name == chosen)
    node = producers.get(chosen)
    if node is not None and node.op_type == "ZipMap" and node.domain == "ai.onnx.ml":
        return node.input[0], node
    shape = _declared_shape(declared.type)
    if declared.type.tensor_type.elem_type not in _FLOAT_TYPES or shape is None or len(shape) != 2 or shape[1] != 2:
        raise _Refused(f"output {chosen!r} must be a float tensor [N, 2] of class probabilities")
    return chosen, None


def _ancestors(output: str, producers: dict[str, Any]) -> set[int]:
    needed: set[int] = set()
    stack = [output]
    seen: set[str] = set()
    while stack:
        name = stack.pop()
        if name in seen:
            continue
        seen.add(name)
        node = producers.get(name)
        if node is None or id(node) in needed:
            continue
        needed.add(id(node))
        stack.extend(n for n in node.input if n)
    return needed


@dataclass
class _Value:
    batched: bool
    rank: int | None
    elem_type: int | None
    dims: list[int | str] | None
    constant: Any = None  # numpy array, for small constants an attribute rule needs (axes, shapes)


def _prove_row_independence(model: Any, input_name: str, output: str) -> None:
    """Walk the graph in order; every node with a batched input must keep axis 0 as the batch, row by row."""
    from onnx import numpy_helper

    graph = model.graph
    opsets = {("" if op.domain == "ai.onnx" else op.domain): int(op.version) for op in model.opset_import}
    infos = {v.name: v for v in [*graph.value_info, *graph.input, *graph.output]}
    values: dict[str, _Value] = {"": _Value(False, None, None, None)}
    for tensor in graph.initializer:
        array = numpy_helper.to_array(tensor)
        values[tensor.name] = _Value(False, array.ndim, tensor.data_type, list(array.shape), array)
    values[input_name] = _Value(True, 2, 1, None)

    def known(name: str) -> _Value:
        if name not in values:
            raise _Refused("the graph is not in topological order")
        return values[name]

    for node in graph.node:
        ins = [known(name) for name in node.input]
        if any(name and name in values for name in node.output):
            raise _Refused(f"operator {node.op_type!r}: defines a value the graph already has")
        outs = []
        for name in node.output:
            info = infos.get(name)
            dims = _declared_shape(info.type) if info is not None else None
            elem = info.type.tensor_type.elem_type if info is not None and info.type.HasField("tensor_type") else None
            outs.append(_Value(False, len(dims) if dims is not None else None, elem or None, dims))
        _fill_types(node, ins, outs)
        if node.op_type == "Constant":
            array = (
                numpy_helper.to_array(next(a.t for a in node.attribute if a.name == "value"))
                if any(a.name == "value" for a in node.attribute)
                else None
            )
            outs[0].constant = array
        elif any(v.batched for v in ins):
            rule = _RULES.get(node.op_type)
            if rule is None:
                raise _Refused(f"operator {node.op_type!r} cannot take a batch of records")
            ranks = rule(node, ins, outs, opsets.get(node.domain or "", 1))
            for value, rank in zip(outs, ranks, strict=False):
                if value.rank is not None and rank is not None and value.rank != rank:
                    raise _Refused(f"operator {node.op_type!r}: its output shape does not keep the batch axis")
                value.batched = True
                value.rank = value.rank if value.rank is not None else rank
        elif all(v.constant is not None for v in ins) and node.op_type in ("Identity", "Reshape", "Squeeze"):
            outs[0].constant = ins[0].constant  # small constant plumbing (axes, shapes) keeps its values
        elif node.op_type == "Cast" and ins[0].constant is not None:
            outs[0].constant = _cast(ins[0].constant, int(_attr(node, "to", 0)))
        for name, value in zip(node.output, outs, strict=False):
            values[name] = value
    final = values.get(output)
    if final is None or not final.batched or final.rank != 2:
        raise _Refused("the score output does not hold one row per record")


_COMPARISONS = frozenset({"Equal", "Less", "Greater", "LessOrEqual", "GreaterOrEqual", "And", "Or", "Xor", "Not"})


def _fill_types(node: Any, ins: list[_Value], outs: list[_Value]) -> None:
    """Element types that shape inference left open (it knows little of ai.onnx.ml)."""
    for position, value in enumerate(outs):
        if value.elem_type is not None:
            continue
        if node.op_type == "Cast":
            value.elem_type = int(_attr(node, "to", 0)) or None
        elif node.op_type in _COMPARISONS or node.op_type in ("IsNaN", "IsInf"):
            value.elem_type = 9  # BOOL
        elif node.op_type in ("ArgMax", "ArgMin"):
            value.elem_type = 7  # INT64
        elif node.op_type in ROW_WISE_ML:
            value.elem_type = 7 if len(ROW_WISE_ML[node.op_type]) == 2 and position == 0 else 1
        elif node.op_type == "Where" and len(ins) > 1:
            value.elem_type = ins[1].elem_type
        elif ins:
            value.elem_type = ins[0].elem_type


def _attr(node: Any, name: str, default: Any = None) -> Any:
    from onnx import helper

    for attribute in node.attribute:
        if attribute.name == name:
            return helper.get_attribute_value(attribute)
    return default


def _cast(array: Any, to: int) -> Any:
    """A constant through ``Cast``: its values only where the cast keeps every one of them exactly (whole
    numbers that fit the target type). A cast that wraps (int64 2**32 to int32 is 0 at run time) or turns a
    NaN into an integer would make the check reason about another axis than the one onnxruntime uses, so
    such a constant is unknown to the check, and a rule that needs it refuses."""
    import numpy as np
    from onnx import helper

    try:
        target = helper.tensor_dtype_to_np_dtype(to)
        with np.errstate(all="ignore"):
            cast = array.astype(target)
            before = array.astype(np.float64)
            same = bool(np.all(np.isfinite(before))) and np.array_equal(cast.astype(np.float64), before)
    except (TypeError, ValueError, KeyError, OverflowError):
        return None
    return cast if same else None


def _axis(value: int, rank: int | None, op: str) -> int:
    if rank is not None and not -rank <= value < rank:
        raise _Refused(f"operator {op!r}: an axis outside the tensor's rank")
    if value >= 0:
        return value
    if rank is None:
        raise _Refused(f"operator {op!r}: a negative axis on a tensor of unknown rank")
    return value + rank


def _axes(node: Any, ins: list[_Value], position: int) -> list[int] | None:
    """Axes from the attribute ``axes`` or, in newer opsets, the constant input at ``position``."""
    axes = _attr(node, "axes")
    given = len(ins) > position and bool(node.input[position])
    if axes is not None and given:
        raise _Refused(f"operator {node.op_type!r}: axes given both as an attribute and as an input")
    if axes is None and given:
        if ins[position].batched or ins[position].constant is None:
            raise _Refused(f"operator {node.op_type!r}: its axes must be constants in the graph")
        axes = [int(a) for a in ins[position].constant.ravel()]
    return None if axes is None else [int(a) for a in axes]


def _no_batch_axis(node: Any, axes: list[int] | None, rank: int | None) -> None:
    if not axes:
        raise _Refused(f"operator {node.op_type!r} without axes would act on the batch axis")
    if any(_axis(a, rank, node.op_type) == 0 for a in axes):
        raise _Refused(f"operator {node.op_type!r} acts along the batch axis (axis 0)")


def _only_first_batched(node: Any, ins: list[_Value]) -> None:
    if any(v.batched for v in ins[1:]):
        raise _Refused(f"operator {node.op_type!r}: only its first input may hold records")


def _unary(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    return [ins[0].rank]


def _broadcast(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    ins = [v for name, v in zip(node.input, ins, strict=True) if name]
    ranks = [v.rank for v in ins if v.rank is not None]
    if len(ranks) != len(ins):
        raise _Refused(f"operator {node.op_type!r}: an input of unknown rank")
    rank = max(ranks)
    for value in ins:
        if value.batched and value.rank != rank:
            raise _Refused(f"operator {node.op_type!r}: a record tensor would be broadcast across the batch")
        if not value.batched and value.rank == rank and value.dims is not None and value.dims[0] != 1:
            raise _Refused(f"operator {node.op_type!r}: a constant spans the batch axis")
    if node.op_type in FLOAT_ONLY and outs[0].elem_type not in _FLOAT_TYPES:
        raise _Refused(f"operator {node.op_type!r} is accepted on floating-point values only")
    return [rank]


def _matmul(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    if ins[0].rank is None or ins[0].rank < 2 or ins[1].rank != 2:
        raise _Refused("operator 'MatMul': records [N, k] times a constant matrix [k, m] only")
    return [ins[0].rank]


def _gemm(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    if _attr(node, "transA", 0):
        raise _Refused("operator 'Gemm' with transA would mix records")
    if len(ins) > 2 and ins[2].rank == 2 and (ins[2].dims is None or ins[2].dims[0] != 1):
        raise _Refused("operator 'Gemm': its bias spans the batch axis")
    return [2]


def _concat(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    if not all(v.batched for v in ins):
        raise _Refused("operator 'Concat': every part must hold the same records")
    rank = ins[0].rank
    if _axis(int(_attr(node, "axis", 0)), rank, "Concat") == 0:
        raise _Refused("operator 'Concat' along the batch axis (axis 0)")
    return [rank]


def _softmax(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    rank = ins[0].rank
    if _axis(int(_attr(node, "axis", -1 if opset >= 13 else 1)), rank, node.op_type) == 0:
        raise _Refused(f"operator {node.op_type!r} along the batch axis (axis 0)")
    return [rank]


def _arg(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    rank = ins[0].rank
    if _axis(int(_attr(node, "axis", 0)), rank, node.op_type) == 0:
        raise _Refused(f"operator {node.op_type!r} along the batch axis (axis 0)")
    return [rank if _attr(node, "keepdims", 1) else (rank - 1 if rank is not None else None)]


def _reduce(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    axes = _axes(node, ins, 1)
    rank = ins[0].rank
    _no_batch_axis(node, axes, rank)
    keep = _attr(node, "keepdims", 1)
    return [rank if keep or rank is None else rank - len(set(axes or []))]


def _reshape(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    if ins[1].constant is None:
        raise _Refused("operator 'Reshape': the new shape must be a constant in the graph")
    if _attr(node, "allowzero", 0):
        raise _Refused("operator 'Reshape' with allowzero is not accepted")
    shape = [int(v) for v in ins[1].constant.ravel()]
    if not shape:
        raise _Refused("operator 'Reshape' to a scalar would mix records")
    if shape[0] != 0:
        dims = ins[0].dims
        row = dims[1:] if dims is not None else None
        keep = "operator 'Reshape' must keep the batch axis (first dimension 0, or -1 with a known row)"
        if shape[0] != -1 or row is None or not all(isinstance(d, int) for d in row):
            raise _Refused(keep)
        if any(d <= 0 for d in shape[1:]):
            raise _Refused(keep)
        size, rest = 1, 1
        for d in row:
            size *= int(d)
        for d in shape[1:]:
            rest *= d
        if rest != size:
            raise _Refused("operator 'Reshape' would move values between records")
    return [len(shape)]


def _flatten(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    # Flatten at axis a gives [d0 * ... * d(a-1), the rest]: only a = 1 keeps one row per record
    axis, rank = int(_attr(node, "axis", 1)), ins[0].rank
    if axis < 0 and rank is None:
        raise _Refused("operator 'Flatten': a negative axis on a tensor of unknown rank")
    if (axis + rank if axis < 0 and rank is not None else axis) != 1:
        raise _Refused("operator 'Flatten' at an axis other than 1 would mix records")
    return [2]


def _squeeze(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    axes = _axes(node, ins, 1)
    rank = ins[0].rank
    _no_batch_axis(node, axes, rank)
    return [None if rank is None else rank - len(set(axes or []))]


def _unsqueeze(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    axes = _axes(node, ins, 1)
    rank = ins[0].rank
    out_rank = None if rank is None or axes is None else rank + len(axes)
    _no_batch_axis(node, axes, out_rank)
    return [out_rank]


def _transpose(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    perm = _attr(node, "perm")
    if perm is None or int(perm[0]) != 0:
        raise _Refused("operator 'Transpose' must keep the batch axis first")
    return [ins[0].rank]


def _gather(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)  # columns picked by constant positions; never an index read from a record
    data, indices = ins[0], ins[1]
    if _axis(int(_attr(node, "axis", 0)), data.rank, "Gather") == 0:
        raise _Refused("operator 'Gather' along the batch axis would select records by position")
    if data.rank is None or indices.rank is None:
        raise _Refused("operator 'Gather': an input of unknown rank")
    return [data.rank + indices.rank - 1]


def _slice(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    if opset < 10:
        axes = _attr(node, "axes")
    else:
        if any(v.constant is None for v in ins[1:] if v.rank is not None):
            raise _Refused("operator 'Slice': starts, ends and axes must be constants in the graph")
        axes = _axes(node, ins, 3)
    _no_batch_axis(node, axes, ins[0].rank)
    return [ins[0].rank]


def _row_wise_ml(node: Any, ins: list[_Value], outs: list[_Value], opset: int) -> list[int | None]:
    _only_first_batched(node, ins)
    if ins[0].rank != 2:
        raise _Refused(f"operator {node.op_type!r} takes records as a [N, C] tensor only")
    return list(ROW_WISE_ML[node.op_type])


_Rule = Callable[[Any, list[_Value], list[_Value], int], list[int | None]]
_RULES: dict[str, _Rule] = {
    **{op: _unary for op in UNARY},
    **{op: _broadcast for op in BROADCAST},
    **{op: _row_wise_ml for op in ROW_WISE_ML},
    "MatMul": _matmul,
    "Gemm": _gemm,
    "Concat": _concat,
    "Softmax": _softmax,
    "LogSoftmax": _softmax,
    "Hardmax": _softmax,
    "ArgMax": _arg,
    "ArgMin": _arg,
    **{op: _reduce for op in SHAPED if op.startswith("Reduce")},
    "Reshape": _reshape,
    "Flatten": _flatten,
    "Squeeze": _squeeze,
    "Unsqueeze": _unsqueeze,
    "Transpose": _transpose,
    "Gather": _gather,
    "Slice": _slice,
}
