"""Builders of small ONNX test models (with ``onnx.helper``) and hostile files for the loader tests."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17
F = TensorProto.FLOAT


def vi(name: str, shape: Sequence[int | str] | None, dtype: int = F) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, dtype, shape)


def model(nodes: list[onnx.NodeProto], inputs: list[onnx.ValueInfoProto],
          outputs: list[onnx.ValueInfoProto], inits: Sequence[TensorProto] = (),
          opset: int = OPSET, name: str = "test", **kwargs: object) -> onnx.ModelProto:
    graph = helper.make_graph(nodes, name, inputs, outputs, list(inits))
    opsets = [helper.make_opsetid("", opset)] + list(kwargs.pop("extra_opsets", []))  # type: ignore[arg-type]
    return helper.make_model(graph, opset_imports=opsets, **kwargs)


def weight(name: str, shape: Sequence[int], dtype: type = np.float32) -> TensorProto:
    return numpy_helper.from_array(np.zeros(shape, dtype=dtype), name)


def save(proto: onnx.ModelProto, path: Path) -> Path:
    onnx.save(proto, str(path))
    return path


def small_cnn(batch: int | str = 1) -> onnx.ModelProto:
    """Conv -> Relu -> MaxPool -> Reshape (shape from Shape/Gather/Concat) -> Gemm -> Softmax.

    The Reshape's target shape is computed at run time from the tensor's own
    shape, so its output shape needs onnx shape inference with data propagation.
    """
    nodes = [
        helper.make_node("Conv", ["x", "w1", "b1"], ["c1"], pads=[1, 1, 1, 1], name="conv1"),
        helper.make_node("Relu", ["c1"], ["r1"], name="relu1"),
        helper.make_node("MaxPool", ["r1"], ["p1"], kernel_shape=[2, 2], strides=[2, 2],
                         name="pool1"),
        helper.make_node("Shape", ["p1"], ["s"], name="shape"),
        helper.make_node("Gather", ["s", "zero"], ["n"], axis=0, name="gather"),
        helper.make_node("Concat", ["n", "minus_one"], ["newshape"], axis=0, name="concat"),
        helper.make_node("Reshape", ["p1", "newshape"], ["flat"], name="flatten"),
        helper.make_node("Gemm", ["flat", "w2", "b2"], ["logits"], transB=1, name="fc"),
        helper.make_node("Softmax", ["logits"], ["y"], axis=-1, name="softmax"),
    ]
    inits = [weight("w1", [8, 3, 3, 3]), weight("b1", [8]), weight("w2", [10, 8 * 4 * 4]),
             weight("b2", [10]), numpy_helper.from_array(np.array([0], np.int64), "zero"),
             numpy_helper.from_array(np.array([-1], np.int64), "minus_one")]
    return model(nodes, [vi("x", [batch, 3, 8, 8])], [vi("y", None)], inits, name="small_cnn")


def chain(count: int, op: str = "Relu", shape: Sequence[int] = (1, 16)) -> onnx.ModelProto:
    """``count`` elementwise nodes in a row."""
    nodes = [helper.make_node(op, [f"t{i}"], [f"t{i + 1}"], name=f"n{i}") for i in range(count)]
    return model(nodes, [vi("t0", list(shape))], [vi(f"t{count}", list(shape))])


def loop_model(trip: int | None) -> onnx.ModelProto:
    """A Loop whose body does a MatMul with an outer-scope weight; trip count constant or an input."""
    body = helper.make_graph(
        [helper.make_node("MatMul", ["h_in", "w"], ["h_out"], name="body_mm"),
         helper.make_node("Identity", ["cond_in"], ["cond_out"], name="body_cond")],
        "body", [vi("i", [], TensorProto.INT64), vi("cond_in", [], TensorProto.BOOL),
                 vi("h_in", [1, 4])], [vi("cond_out", [], TensorProto.BOOL), vi("h_out", [1, 4])])
    inits = [weight("w", [4, 4])]
    inputs = [vi("h0", [1, 4])]
    if trip is None:
        inputs.append(vi("m", [], TensorProto.INT64))
    else:
        inits.append(numpy_helper.from_array(np.array(trip, np.int64), "m"))
    inits.append(numpy_helper.from_array(np.array(True), "cond"))
    node = helper.make_node("Loop", ["m", "cond", "h0"], ["h"], body=body, name="loop")
    return model([node], inputs, [vi("h", [1, 4])], inits)


# ------------------------------------------------------------------ raw protobuf for deep nesting

def _varint(value: int) -> bytes:
    out = bytearray()
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _field(number: int, payload: bytes) -> bytes:
    """A length-delimited protobuf field."""
    return _varint(number << 3 | 2) + _varint(len(payload)) + payload


def deeply_nested_if(depth: int) -> bytes:
    """A serialised model with ``depth`` nested If nodes, built as raw protobuf bytes.

    onnx.helper cannot build it past protobuf's own nesting limit, which is the point.
    Field numbers from onnx.proto: GraphProto node=1 name=2 output=12; NodeProto
    input=1 output=2 op_type=4 attribute=5; AttributeProto name=1 g=6 type=20 (GRAPH=5);
    ModelProto ir_version=1 graph=7 opset_import=8; OperatorSetIdProto version=2.
    """
    out_vi = vi("y", [2]).SerializeToString()
    graph = _field(1, _field(1, b"x") + _field(2, b"y") + _field(4, b"Identity")) + \
        _field(2, b"g") + _field(12, out_vi)
    leaf = graph
    for _ in range(depth):
        attr = _field(1, b"then_branch") + _field(6, graph) + _varint(20 << 3) + _varint(5)
        attr2 = _field(1, b"else_branch") + _field(6, leaf) + _varint(20 << 3) + _varint(5)
        node = _field(1, b"c") + _field(2, b"y") + _field(4, b"If") + _field(5, attr) + \
            _field(5, attr2)
        graph = _field(1, node) + _field(2, b"g") + _field(12, out_vi)
    inputs = _field(11, vi("x", [2]).SerializeToString()) + \
        _field(11, vi("c", [], TensorProto.BOOL).SerializeToString())
    return _varint(1 << 3) + _varint(8) + _field(7, graph + inputs) + \
        _field(8, _varint(2 << 3) + _varint(OPSET))
