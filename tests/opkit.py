"""Builders for op cost-function tests: hand-made Nodes and one-node ONNX models.

``node`` builds a ``Node`` directly. ``inferred_node`` builds a one-node model
with ``onnx.helper``, runs ``onnx.shape_inference`` (strict) on it and returns
the ``Node`` with the inferred output shapes, so tests see what the loader will.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from gate.model.graph import Graph, Node, TensorInfo

OPSET = 21


def ti(name: str, shape: Sequence[int | str] | None, dtype: str = "FLOAT") -> TensorInfo:
    return TensorInfo(name, None if shape is None else tuple(shape), dtype)


def node(op_type: str, inputs: Sequence[TensorInfo | Sequence[int | str] | None],
         outputs: Sequence[TensorInfo | Sequence[int | str] | None] = ((),),
         attrs: Mapping[str, Any] | None = None, params: Sequence[int] = (),
         const_values: Mapping[int, tuple[int, ...]] | None = None,
         subgraphs: Mapping[str, Graph] | None = None, name: str = "n") -> Node:
    """A Node from shapes (or TensorInfos); an output of None has unknown shape."""

    def info(value: Any, label: str) -> TensorInfo | None:
        if value is None or isinstance(value, TensorInfo):
            return value
        return ti(label, value)

    ins = tuple(info(v, f"in{i}") for i, v in enumerate(inputs))
    outs = tuple(info(v, f"out{i}") or ti(f"out{i}", None) for i, v in enumerate(outputs))
    return Node(0, name, op_type, "", ins, outs, dict(attrs or {}), frozenset(params),
                dict(subgraphs or {}), dict(const_values or {}))


def graph(*nodes: Node) -> Graph:
    return Graph(tuple(nodes), {}, (), ())


def _tensor_info(value: onnx.ValueInfoProto) -> TensorInfo:
    tensor = value.type.tensor_type
    dtype = TensorProto.DataType.Name(tensor.elem_type)
    if not tensor.HasField("shape"):
        return TensorInfo(value.name, None, dtype)
    dims: list[int | str] = []
    for dim in tensor.shape.dim:
        if dim.HasField("dim_value"):
            dims.append(int(dim.dim_value))
        else:
            dims.append(dim.dim_param or "?")
    return TensorInfo(value.name, tuple(dims), dtype)


def _plain(value: Any) -> Any:
    """Attribute values as the loader gives them: bytes decoded to str."""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, list):
        return [_plain(v) for v in value]
    return value


def one_node_model(op_type: str, inputs: Sequence[Sequence[int] | None],
                   attrs: Mapping[str, Any] | None = None,
                   constants: Mapping[int, np.ndarray] | None = None, n_outputs: int = 1,
                   dtypes: Mapping[int, int] | None = None, opset: int = OPSET,
                   domain: str = "") -> onnx.ModelProto:
    """A model of one node; input i is graph input ``x{i}`` (or an initializer if constant)."""
    constants = dict(constants or {})
    names = [f"x{i}" if shape is not None else "" for i, shape in enumerate(inputs)]
    graph_inputs, inits = [], []
    for i, shape in enumerate(inputs):
        if shape is None:
            continue
        if i in constants:
            inits.append(numpy_helper.from_array(constants[i], names[i]))
        else:
            elem = (dtypes or {}).get(i, TensorProto.FLOAT)
            graph_inputs.append(helper.make_tensor_value_info(names[i], elem, list(shape)))
    outs = [f"y{j}" for j in range(n_outputs)]
    onnx_node = helper.make_node(op_type, names, outs, domain=domain, **dict(attrs or {}))
    out_infos = [helper.make_tensor_value_info(o, TensorProto.UNDEFINED, None) for o in outs]
    g = helper.make_graph([onnx_node], "t", graph_inputs, out_infos, inits)
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])


def node_from_model(model: onnx.ModelProto, params: Sequence[int] = ()) -> Node:
    """Shape-infer (strict) a one-node model and convert its node as the loader would."""
    model = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    onnx_node = model.graph.node[0]
    known = {v.name: _tensor_info(v) for v in
             [*model.graph.input, *model.graph.value_info, *model.graph.output]}
    inits = {init.name: init for init in model.graph.initializer}
    for init in inits.values():
        known[init.name] = TensorInfo(init.name, tuple(init.dims),
                                      TensorProto.DataType.Name(init.data_type))
    names = list(onnx_node.input)
    ins = tuple(known[n] if n else None for n in names)
    const_values = {}
    for i, name in enumerate(names):
        if name in inits:
            value = numpy_helper.to_array(inits[name])
            if value.dtype.kind in "iub" and value.size <= 64:
                const_values[i] = tuple(int(v) for v in value.ravel())
    attributes = {a.name: _plain(helper.get_attribute_value(a)) for a in onnx_node.attribute}
    param_positions = frozenset(params) | frozenset(i for i, n in enumerate(names) if n in inits)
    return Node(0, "n", onnx_node.op_type, onnx_node.domain, ins,
                tuple(known[o] for o in onnx_node.output), attributes, param_positions, {},
                const_values)


def inferred_node(op_type: str, inputs: Sequence[Sequence[int] | None],
                  attrs: Mapping[str, Any] | None = None, params: Sequence[int] = (),
                  constants: Mapping[int, np.ndarray] | None = None, n_outputs: int = 1,
                  dtypes: Mapping[int, int] | None = None, opset: int = OPSET,
                  domain: str = "") -> Node:
    """Build, shape-infer (strict) and convert a one-node model.

    ``inputs`` are shapes (None = omitted optional input); ``constants`` become
    initializers with those values (and ``const_values`` when integral and small);
    ``params`` are input positions reported as parameters.
    """
    model = one_node_model(op_type, inputs, attrs, constants, n_outputs, dtypes, opset, domain)
    return node_from_model(model, params)
