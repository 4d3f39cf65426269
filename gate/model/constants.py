"""Constants at inference time: which nodes fold offline, which inputs are parameters, how stored.

A tensor is constant at inference when it is an initializer, a Constant node's
value, or the output of a deterministic node whose inputs are all constant
(Unsqueeze or Transpose of a weight, ConstantOfShape of a constant shape,
DequantizeLinear of int8 weights, a Slice of one packed weight, ...). A
deploying runtime computes such nodes once, offline: they are *folded*, not
layers of the deployed model, and roofgate costs them nothing. Folding works
from shapes and element counts only; no weight payload is read. Small integer
and boolean tensors (shapes, axes, conditions) are the one exception, as in
the loader: their values are computed by the shape-value rules
(``gate.model.shape_rules``), so an If whose condition is computed from
constants takes its branch.

Every constant knows how it is *stored* (``ParamSource``): views, slices,
concatenations and narrowing conversions (Cast, QuantizeLinear,
DequantizeLinear) read the stored tensors behind them at their stored element
size; any other folding node materialises a new stored tensor (a
ConstantOfShape fill, a product of two constants). A layer is charged what it
reads of the stored tensors, so one packed weight sliced six ways is charged
once in total, and an int8 weight behind a DequantizeLinear is int8 bytes.

Not parameters: small integer metadata (INT64 or BOOL tensors of at most
``CONST_VALUE_LIMIT`` elements: shapes, axes, indices, conditions), one-element
constants (a scale, an epsilon: immediate operands of the op that reads them)
and quantization scales and zero points, which runtimes fold into the
requantization step.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import onnx
from onnx import TensorProto, helper

from gate.model.graph import Node, ParamSource, StoredTensor, TensorInfo, stored_as_itself
from gate.model.shape_rules import evaluate_node

CONST_VALUE_LIMIT = 64
METADATA_DTYPES = frozenset({"INT64", "BOOL"})
_VALUE_DTYPES = frozenset({"INT8", "UINT8", "INT16", "UINT16", "INT32", "UINT32", "INT64",
                           "UINT64", "BOOL"})

# Never folded: non-deterministic ops, and ops with bodies (control flow is costed).
_NEVER_FOLDED = frozenset({"RandomNormal", "RandomUniform", "RandomNormalLike",
                           "RandomUniformLike", "Multinomial", "Bernoulli"})
_BODY_TYPES = (onnx.AttributeProto.GRAPH, onnx.AttributeProto.GRAPHS)
# Read (a part of) their data input's elements as they are: the stored tensors pass through.
_VIEW_OPS = frozenset({"Identity", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Transpose",
                       "Slice", "Gather", "GatherElements", "GatherND", "Split", "Dropout"})
_JOIN_OPS = frozenset({"Concat"})
# Element-type conversions: a runtime keeps the narrower of the two types.
_CONVERT_OPS = frozenset({"Cast", "CastLike", "QuantizeLinear", "DequantizeLinear"})

# Input positions holding quantization scales and zero points (ONNX operator spec).
QUANT_METADATA_POSITIONS: Mapping[str, tuple[int, ...]] = {
    "QuantizeLinear": (1, 2), "DequantizeLinear": (1, 2),
    "QLinearConv": (1, 2, 4, 5, 6, 7), "QLinearMatMul": (1, 2, 4, 5, 6, 7),
    "ConvInteger": (2, 3), "MatMulInteger": (2, 3),
    # com.microsoft QOperator ops (public contrib-op documentation; gate/ops/contrib_*.py),
    # so a fused op counts the parameters of its standard-op decomposition.
    "QLinearAdd": (1, 2, 4, 5, 6, 7), "QLinearMul": (1, 2, 4, 5, 6, 7),
    "QLinearSigmoid": (1, 2, 3, 4), "QLinearLeakyRelu": (1, 2, 3, 4),
    "QLinearSoftmax": (1, 2, 3, 4), "QLinearAveragePool": (1, 2, 3, 4),
    "QLinearGlobalAveragePool": (1, 2, 3, 4), "QGemm": (1, 2, 4, 5, 7, 8),
    "DynamicQuantizeMatMul": (3,), "MatMulNBits": (2, 3),
}

# Ops whose small integer outputs are computed from small integer inputs.
_VALUE_OPS = frozenset({
    "Equal", "Not", "And", "Or", "Xor", "Greater", "Less", "GreaterOrEqual", "LessOrEqual",
    "Add", "Sub", "Mul", "Div", "Mod", "Neg", "Abs", "Min", "Max", "Sign", "Where", "Cast",
    "Identity", "Squeeze", "Unsqueeze", "Reshape", "Flatten", "Concat", "Gather", "Slice",
    "ConstantOfShape", "Range", "Expand", "Tile", "ReduceSum", "ReduceProd", "ReduceMin",
    "ReduceMax",
})


def is_metadata(tensor: TensorInfo | None, source: ParamSource) -> bool:
    """Not parameters: small INT64/BOOL constants (shapes, axes, indices, conditions) and
    one-element constants (a scale, an epsilon: immediate operands, not stored weights)."""
    dtype = tensor.dtype if tensor is not None and tensor.dtype != "UNDEFINED" else source.dtype
    numel = source.numel if source.numel is not None else (tensor.numel if tensor else None)
    if numel is None:
        return False
    return numel <= 1 or (dtype in METADATA_DTYPES and numel <= CONST_VALUE_LIMIT)


def is_parameter(op_type: str, position: int, tensor: TensorInfo | None,
                 source: ParamSource) -> bool:
    """True when constant input ``position`` of an ``op_type`` node is a model parameter."""
    if position in QUANT_METADATA_POSITIONS.get(op_type, ()):
        return False
    return not is_metadata(tensor, source)


def logical_source(node: Node, position: int, source: ParamSource) -> ParamSource:
    """A packed weight as the logical weights it holds: a ``com.microsoft`` MatMulNBits
    weight (input 1) is stored as uint8 ``[N, ceil(K / block_size), block_size * bits /
    8]``, two 4-bit values per byte; its parameters are the N x K weights of its
    decomposition (DequantizeLinear of an int4 ``[K, N]`` tensor + MatMul), each stored at
    ``bits`` bits. The layout is from memory (public contrib-op documentation); a tensor
    that does not hold exactly that many bytes is left as stored. The padding of a last
    partial block (K not a multiple of block_size) is not counted: under one block per row.
    """
    if node.op_type != "MatMulNBits" or node.domain != "com.microsoft" or position != 1:
        return source
    k, n = int(node.attr("K", 0)), int(node.attr("N", 0))
    bits, block = int(node.attr("bits", 4)), int(node.attr("block_size", 0))
    if min(k, n, bits, block) < 1 or len(source.stored) != 1 or (block * bits) % 8:
        return source
    stored = source.stored[0]
    packed = n * -(-k // block) * (block * bits // 8)
    if stored.bits != 8 or stored.numel != packed or source.numel != packed:
        return source
    logical = StoredTensor(stored.name, n * k, bits, stored.dtype)
    return ParamSource((logical,), n * k, bits, source.dtype)


def folds(proto: onnx.NodeProto, op_type: str, domain: str, input_names: Sequence[str],
          is_constant: Mapping[str, object]) -> bool:
    """True when the node computes a constant: deterministic, no body, every input constant.

    ``op_type``, ``domain`` and ``input_names`` are the node's, read once by the caller
    (each read of a protobuf field builds a new object; this runs once per node).
    """
    if domain not in ("", "ai.onnx") or op_type in _NEVER_FOLDED:
        return False
    if op_type == "Constant":
        return True
    present = False
    for name in input_names:
        if name:
            if name not in is_constant:
                return False  # the common case (an activation input): decided cheaply
            present = True
    return present and not any(a.type in _BODY_TYPES for a in proto.attribute)


def folded_sources(op_type: str, inputs: Sequence[ParamSource | None],
                   outputs: Sequence[TensorInfo]) -> list[ParamSource]:
    """How each output of a folding node is stored (see the module docstring)."""
    data = [s for s in inputs if s is not None]
    if op_type not in _JOIN_OPS:
        data = data[:1] if inputs and inputs[0] is not None else []
    sources = []
    for position, info in enumerate(outputs):
        passes = data and (op_type in _JOIN_OPS or op_type in _CONVERT_OPS or (
            op_type in _VIEW_OPS and (position == 0 or op_type == "Split")))
        sources.append(_passed_through(op_type, data, info) if passes else stored_as_itself(info))
    return sources


def _passed_through(op_type: str, data: Sequence[ParamSource], info: TensorInfo) -> ParamSource:
    first = data[0]
    stored_tensors = first.stored if len(data) == 1 else tuple(
        {s.name: s for source in data for s in source.stored}.values())
    bits, dtype = first.bits, first.dtype
    out_bits = info.bits_per_element
    if op_type in _CONVERT_OPS and 0 < out_bits < bits:
        bits, dtype = out_bits, info.dtype
    numel = info.numel
    if numel is None and op_type not in ("Slice", "Gather", "GatherElements", "GatherND",
                                         "Split", "Concat"):
        numel = first.numel  # a view or conversion keeps the element count
    return ParamSource(stored_tensors, numel, bits, dtype)


def constant_node_info(proto: onnx.NodeProto) -> TensorInfo | None:
    """The TensorInfo of a Constant node's value from its attribute (values never read)."""
    name = proto.output[0] if proto.output else ""
    for attribute in proto.attribute:
        if attribute.name == "value" and attribute.type == onnx.AttributeProto.TENSOR:
            tensor = attribute.t
            return TensorInfo(name, tuple(int(d) for d in tensor.dims), _dtype(tensor.data_type))
        if attribute.name == "sparse_value":
            sparse = attribute.sparse_tensor
            return TensorInfo(name, tuple(int(d) for d in sparse.dims),
                              _dtype(sparse.values.data_type))
        shapes = {"value_int": ((), "INT64"), "value_float": ((), "FLOAT"),
                  "value_string": ((), "STRING"),
                  "value_ints": ((len(attribute.ints),), "INT64"),
                  "value_floats": ((len(attribute.floats),), "FLOAT"),
                  "value_strings": ((len(attribute.strings),), "STRING")}
        if attribute.name in shapes:
            shape, dtype = shapes[attribute.name]
            return TensorInfo(name, shape, dtype)
    return None


def _dtype(elem_type: int) -> str:
    try:
        return TensorProto.DataType.Name(elem_type)
    except ValueError:
        return "UNDEFINED"


# ------------------------------------------------------------------ small integer values

def small_values(proto: onnx.NodeProto, inputs: Sequence[TensorInfo | None],
                 values: Sequence[tuple[int, ...] | None], outputs: Sequence[TensorInfo],
                 opset: int) -> dict[str, tuple[int, ...]]:
    """Values of the small integer outputs of a folding node whose inputs are known.

    Shape and Size of a constant come from its dims; the ops in ``_VALUE_OPS`` are
    evaluated by the shape-value rules (``gate.model.shape_rules``, each checked
    against the ONNX reference implementation). Anything else, or any failure,
    leaves the outputs unknown (never guessed). ``opset`` is kept for callers; the
    rules read both the attribute and the input forms of older and newer opsets.
    """
    if proto.op_type not in _VALUE_OPS | {"Shape", "Size"} or len(outputs) != 1:
        return {}
    out = outputs[0]
    if (not out.name or out.dtype not in _VALUE_DTYPES or out.numel is None
            or out.numel > CONST_VALUE_LIMIT):
        return {}  # only small outputs of known size: a hostile Range or Tile is never run
    feeds = _feeds(proto, inputs, values) if proto.op_type not in ("Shape", "Size") else {}
    if feeds is None:
        return {}
    shapes = {t.name: tuple(int(d) for d in t.shape) for t in inputs  # type: ignore[union-attr]
              if t is not None and t.is_static}
    result = evaluate_node(proto, feeds, shapes.get)
    if result is None or result.dtype.kind not in "iub" or result.size > CONST_VALUE_LIMIT:
        return {}
    return {outputs[0].name: tuple(int(v) for v in result.reshape(-1).tolist())}


def _feeds(proto: onnx.NodeProto, inputs: Sequence[TensorInfo | None],
           values: Sequence[tuple[int, ...] | None]) -> dict[str, np.ndarray] | None:
    feeds: dict[str, np.ndarray] = {}
    for name, info, value in zip(proto.input, inputs, values):
        if not name:
            continue
        if info is None or value is None or not info.is_static or info.dtype not in _VALUE_DTYPES:
            return None
        np_type = helper.tensor_dtype_to_np_dtype(TensorProto.DataType.Value(info.dtype))
        try:
            feeds[name] = np.array(value, dtype=np_type).reshape(info.shape)  # type: ignore[arg-type]
        except (ValueError, OverflowError):
            return None
    return feeds
