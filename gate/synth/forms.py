"""The same network in the other forms exporters write it in (for tests and benchmarks).

Exporters write one network many ways: weights as direct initializers, behind a
view (Unsqueeze, Squeeze, Transpose, Reshape) or a Cast, built by a
ConstantOfShape subgraph, or stored in Constant nodes; an int8 model as QDQ
(float ops reading DequantizeLinear of int8 tensors, activations through
QuantizeLinear -> DequantizeLinear) or with QOperator ops (QLinearConv,
QLinearMatMul, MatMulInteger). ``rewrite_weights`` and ``quantize`` turn a
model built by ``gate.synth`` into those forms without changing what it
computes, so tests can check that every form costs the same.

Weight values are never needed: an external-data initializer stays an external
reference (never read), and inline ones become zeros of the new layout.
"""

from __future__ import annotations

from collections.abc import Callable
from math import prod

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

WEIGHT_FORMS: tuple[str, ...] = ("direct", "view", "transpose", "cast", "reshape",
                                 "constant_of_shape", "constant")
QUANTIZED_FORMS: tuple[str, ...] = ("qdq", "qlinear", "integer")
MIN_WEIGHT_ELEMENTS = 65  # smaller float initializers (scalars, tiny shapes) stay as they are
_MATRIX_OPS = ("Conv", "MatMul", "Gemm", "LSTM", "GRU")
_ACTIVATION_POSITION = 0
_BIAS_POSITIONS = {"Conv": 2, "Gemm": 2, "LSTM": 3, "GRU": 3}  # stored int32 when quantized


def rewrite_weights(model: onnx.ModelProto, form: str) -> onnx.ModelProto:
    """A copy of ``model`` with every float weight initializer written in ``form``.

    ``view``: stored with one fewer or one more leading unit dim, restored by
    Unsqueeze or Squeeze; ``transpose``: stored transposed, restored by
    Transpose; ``cast``: read through a Cast to its own type; ``reshape``: stored
    flat, restored by Reshape; ``constant_of_shape``: built by ConstantOfShape
    from a constant shape; ``constant``: a Constant node (zeros) instead.
    """
    if form not in WEIGHT_FORMS:
        raise ValueError(f"form must be one of {WEIGHT_FORMS}, not {form!r}")
    out = onnx.ModelProto()
    out.CopyFrom(model)
    if form == "direct":
        return out
    graph = out.graph
    kept, nodes = [], []
    for tensor in graph.initializer:
        if not _is_weight(tensor):
            kept.append(tensor)
            continue
        stored, made = _REWRITERS[form](tensor)
        kept.extend(stored)
        nodes.extend(made)
    del graph.initializer[:]
    graph.initializer.extend(kept)
    existing = list(graph.node)
    del graph.node[:]
    graph.node.extend(nodes + existing)
    return out


def _is_weight(tensor: TensorProto) -> bool:
    return (tensor.data_type in (TensorProto.FLOAT, TensorProto.FLOAT16)
            and prod(tensor.dims) >= MIN_WEIGHT_ELEMENTS)


def _relaid(tensor: TensorProto, name: str, dims: list[int],
            data_type: int | None = None) -> TensorProto:
    """``tensor`` under a new name and layout: the external reference kept, or zeros."""
    copy = TensorProto()
    copy.CopyFrom(tensor)
    copy.name = name
    del copy.dims[:]
    copy.dims.extend(dims)
    if data_type is not None:
        copy.data_type = data_type
    if copy.data_location != TensorProto.EXTERNAL:
        np_type = helper.tensor_dtype_to_np_dtype(copy.data_type)
        for field in ("float_data", "int32_data", "raw_data"):
            copy.ClearField(field)
        copy.raw_data = np.zeros(dims, dtype=np_type).tobytes()
    return copy


def _ints(name: str, values: list[int]) -> TensorProto:
    return helper.make_tensor(name, TensorProto.INT64, [len(values)], values)


Rewritten = tuple[list[TensorProto], list[onnx.NodeProto]]


def _view(tensor: TensorProto) -> Rewritten:
    dims, name = list(tensor.dims), tensor.name
    stored = f"{name}.stored"
    if dims[0] == 1:
        return ([_relaid(tensor, stored, dims[1:]), _ints(f"{name}.axes", [0])],
                [helper.make_node("Unsqueeze", [stored, f"{name}.axes"], [name],
                                  name=f"{name}.unsqueeze")])
    return ([_relaid(tensor, stored, [1, *dims]), _ints(f"{name}.axes", [0])],
            [helper.make_node("Squeeze", [stored, f"{name}.axes"], [name], name=f"{name}.squeeze")])


def _transpose(tensor: TensorProto) -> Rewritten:
    dims, name = list(tensor.dims), tensor.name
    perm = list(reversed(range(len(dims))))
    return ([_relaid(tensor, f"{name}.stored", [dims[p] for p in perm])],
            [helper.make_node("Transpose", [f"{name}.stored"], [name], perm=perm,
                              name=f"{name}.transpose")])


def _cast(tensor: TensorProto) -> Rewritten:
    name = tensor.name
    return ([_relaid(tensor, f"{name}.stored", list(tensor.dims))],
            [helper.make_node("Cast", [f"{name}.stored"], [name], to=tensor.data_type,
                              name=f"{name}.cast")])


def _reshape(tensor: TensorProto) -> Rewritten:
    dims, name = list(tensor.dims), tensor.name
    return ([_relaid(tensor, f"{name}.stored", [prod(dims)]), _ints(f"{name}.shape", dims)],
            [helper.make_node("Reshape", [f"{name}.stored", f"{name}.shape"], [name],
                              name=f"{name}.reshape")])


def _constant_of_shape(tensor: TensorProto) -> Rewritten:
    name = tensor.name
    fill = helper.make_tensor("fill", tensor.data_type, [1], [0.0])
    return ([_ints(f"{name}.shape", list(tensor.dims))],
            [helper.make_node("ConstantOfShape", [f"{name}.shape"], [name], value=fill,
                              name=f"{name}.fill")])


def _constant(tensor: TensorProto) -> Rewritten:
    dims, name = list(tensor.dims), tensor.name
    np_type = helper.tensor_dtype_to_np_dtype(tensor.data_type)
    value = numpy_helper.from_array(np.zeros(dims, dtype=np_type), name)
    return [], [helper.make_node("Constant", [], [name], value=value, name=f"{name}.constant")]


_REWRITERS: dict[str, Callable[[TensorProto], Rewritten]] = {
    "view": _view, "transpose": _transpose, "cast": _cast, "reshape": _reshape,
    "constant_of_shape": _constant_of_shape, "constant": _constant,
}


# ------------------------------------------------------------------ quantized forms

def quantize(model: onnx.ModelProto, form: str) -> onnx.ModelProto:
    """A copy of ``model`` with every Conv, MatMul, Gemm, LSTM and GRU at int8 in ``form``.

    ``qdq``: weights stored int8 (biases int32) behind DequantizeLinear, every
    activation the op reads and writes through QuantizeLinear -> DequantizeLinear
    (per-tensor scale, zero point 0). ``qlinear``: Conv as QLinearConv and
    MatMul/Gemm as QLinearMatMul (Gemm weights stored [K, N]); ``integer``: Conv as
    ConvInteger and MatMul/Gemm as MatMulInteger with int32 outputs. In the
    QOperator forms a graph input the op reads becomes int8 (an int8 pipeline feeds
    the model) and a graph output it writes stays integer; they need bias-free
    Conv/Gemm and support no LSTM/GRU (ONNX has no quantized recurrent op).
    """
    if form not in QUANTIZED_FORMS:
        raise ValueError(f"form must be one of {QUANTIZED_FORMS}, not {form!r}")
    out = onnx.ModelProto()
    out.CopyFrom(model)
    graph = out.graph
    weights = {t.name: t for t in graph.initializer}
    graph.initializer.extend([helper.make_tensor("q.scale", TensorProto.FLOAT, [], [0.05]),
                              helper.make_tensor("q.zero", TensorProto.INT8, [], [0])])
    nodes: list[onnx.NodeProto] = []
    quantized: set[str] = set()  # activations already behind a Q -> DQ pair (read twice: one pair)
    for node in graph.node:
        if node.op_type not in _MATRIX_OPS or node.domain not in ("", "ai.onnx"):
            nodes.append(node)
        elif form == "qdq":
            nodes.extend(_qdq(node, weights, graph, quantized))
        else:
            nodes.extend(_qoperator(node, weights, graph, form))
    del graph.node[:]
    graph.node.extend(nodes)
    for value in graph.output:  # integer forms end in int32 or int8 tensors
        value.type.tensor_type.elem_type = _output_type(value.name, nodes)
    return out


def _output_type(name: str, nodes: list[onnx.NodeProto]) -> int:
    producer = next((n for n in nodes if name in n.output), None)
    kinds = {"ConvInteger": TensorProto.INT32, "MatMulInteger": TensorProto.INT32,
             "QLinearConv": TensorProto.INT8, "QLinearMatMul": TensorProto.INT8}
    return kinds.get(producer.op_type if producer else "", TensorProto.FLOAT)


def _int8_weight(name: str, weights: dict[str, TensorProto], graph: onnx.GraphProto,
                 dims: list[int] | None = None, data_type: int = TensorProto.INT8) -> str:
    """Replace float initializer ``name`` by an int8 (or int32) one, same layout unless ``dims``."""
    tensor = weights[name]
    stored = _relaid(tensor, f"{name}.q", dims or list(tensor.dims), data_type)
    if stored.data_location == TensorProto.EXTERNAL:  # the quantized size
        for entry in stored.external_data:
            if entry.key == "length":
                entry.value = str(prod(stored.dims) * (4 if data_type == TensorProto.INT32 else 1))
    graph.initializer.remove(tensor)
    graph.initializer.append(stored)
    return stored.name


def _qdq(node: onnx.NodeProto, weights: dict[str, TensorProto],
         graph: onnx.GraphProto, quantized: set[str]) -> list[onnx.NodeProto]:
    made: list[onnx.NodeProto] = []
    new_inputs = list(node.input)
    for position, name in enumerate(node.input):
        if not name:
            continue
        bias = position == _BIAS_POSITIONS.get(node.op_type)
        if name in weights and (_is_weight(weights[name]) or bias):
            stored = _int8_weight(name, weights, graph,
                                  data_type=TensorProto.INT32 if bias else TensorProto.INT8)
            made.append(_dequantize(stored, name, bias))
        elif position == _ACTIVATION_POSITION:
            if name not in quantized:
                made.extend(_quantize_pair(name, f"{name}.q"))
                quantized.add(name)
            new_inputs[position] = f"{name}.q.dq"
    body = onnx.NodeProto()
    body.CopyFrom(node)
    del body.input[:]
    body.input.extend(new_inputs)
    output = node.output[0]
    body.output[0] = f"{output}.float"
    return [*made, body, *_quantize_pair(f"{output}.float", f"{output}.q", final=output)]


def _dequantize(stored: str, output: str, bias: bool = False) -> onnx.NodeProto:
    """Dequantize a stored tensor; an int32 bias has zero point 0 (omitted, as the spec requires)."""
    inputs = [stored, "q.scale"] if bias else [stored, "q.scale", "q.zero"]
    return helper.make_node("DequantizeLinear", inputs, [output], name=f"{output}.dequantize")


def _quantize_pair(name: str, prefix: str, final: str | None = None) -> list[onnx.NodeProto]:
    return [helper.make_node("QuantizeLinear", [name, "q.scale", "q.zero"], [prefix],
                             name=f"{prefix}.quantize"),
            helper.make_node("DequantizeLinear", [prefix, "q.scale", "q.zero"],
                             [final or f"{prefix}.dq"], name=f"{prefix}.dequantize")]


def _qoperator(node: onnx.NodeProto, weights: dict[str, TensorProto], graph: onnx.GraphProto,
               form: str) -> list[onnx.NodeProto]:
    if node.op_type in ("LSTM", "GRU"):
        raise ValueError(f"ONNX has no QOperator form of {node.op_type}")
    if len([n for n in node.input if n]) > 2:
        raise ValueError(f"{node.name}: the QOperator forms here need a bias-free {node.op_type}")
    x, w = node.input[0], node.input[1]
    dims = list(weights[w].dims)
    attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
    if node.op_type == "Gemm" and attrs.pop("transB", 0):
        dims = dims[::-1]  # stored [K, N] for the matrix product
    attrs.pop("transA", None), attrs.pop("alpha", None), attrs.pop("beta", None)
    stored = _int8_weight(w, weights, graph, dims)
    made, x_q = _int8_input(x, graph, node.name)
    conv = node.op_type == "Conv"
    output = node.output[0]
    if form == "integer":
        op = "ConvInteger" if conv else "MatMulInteger"
        made.append(helper.make_node(op, [x_q, stored], [output], name=node.name,
                                     **(attrs if conv else {})))
        return made
    op = "QLinearConv" if conv else "QLinearMatMul"
    at_boundary = any(v.name == output for v in graph.output)
    scale_zero = ["q.scale", "q.zero"]
    made.append(helper.make_node(op, [x_q, *scale_zero, stored, *scale_zero, *scale_zero],
                                 [output if at_boundary else f"{output}.q"], name=node.name,
                                 **(attrs if conv else {})))
    if not at_boundary:
        made.append(helper.make_node("DequantizeLinear", [f"{output}.q", *scale_zero], [output],
                                     name=f"{node.name}.dequantize_output"))
    return made


def _int8_input(x: str, graph: onnx.GraphProto, name: str) -> tuple[list[onnx.NodeProto], str]:
    """A graph input becomes int8 itself (an int8 pipeline feeds the model); any other
    activation is quantized by a QuantizeLinear."""
    for value in graph.input:
        if value.name == x:
            value.type.tensor_type.elem_type = TensorProto.INT8
            return [], x
    return [helper.make_node("QuantizeLinear", [x, "q.scale", "q.zero"], [f"{x}.q"],
                             name=f"{name}.quantize_input")], f"{x}.q"
