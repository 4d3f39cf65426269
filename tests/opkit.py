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


# --- Fused ops against their decomposition into standard ops (gate/ops/attention.py, contrib*).

def scalar_nodes(name: str, value: float) -> list[onnx.NodeProto]:
    """A float scalar built without a parameter: ConstantOfShape of an empty shape.

    A float Constant or initializer would count as a model parameter; the fused ops
    carry such scalars as attributes, so their decompositions must not add parameters.
    """
    shape = helper.make_tensor(f"{name}_shape", TensorProto.INT64, [0], [])
    return [helper.make_node("Constant", [], [f"{name}_shape"], value=shape),
            helper.make_node("ConstantOfShape", [f"{name}_shape"], [name],
                             value=helper.make_tensor(f"{name}_v", TensorProto.FLOAT, [1], [value]))]


def int_constant(name: str, values: Sequence[int]) -> onnx.NodeProto:
    """A small INT64 Constant (shapes, axes): metadata, not a parameter."""
    return helper.make_node("Constant", [], [name], value=helper.make_tensor(
        name, TensorProto.INT64, [len(values)], list(values)))


def graph_model(nodes: Sequence[onnx.NodeProto], inputs: Mapping[str, Sequence[int]],
                outputs: Sequence[str], inits: Mapping[str, np.ndarray] | None = None,
                opset: int = OPSET, contrib: bool = False,
                dtypes: Mapping[str, int] | None = None) -> onnx.ModelProto:
    """A model of ``nodes``: float graph inputs of the given shapes, untyped outputs."""
    graph_inputs = [helper.make_tensor_value_info(n, (dtypes or {}).get(n, TensorProto.FLOAT),
                                                  list(s)) for n, s in inputs.items()]
    graph_outputs = [helper.make_tensor_value_info(n, TensorProto.UNDEFINED, None) for n in outputs]
    initializers = [numpy_helper.from_array(v, n) for n, v in (inits or {}).items()]
    g = helper.make_graph(list(nodes), "t", graph_inputs, graph_outputs, initializers)
    opsets = [helper.make_opsetid("", opset)]
    if contrib:
        opsets.append(helper.make_opsetid("com.microsoft", 1))
    return helper.make_model(g, opset_imports=opsets)


def traced_macs(model: onnx.ModelProto, feeds: Mapping[str, np.ndarray]) -> int:
    """MACs of every MatMul/Gemm/Conv, from the arrays ``onnx.reference`` actually feeds them.

    An execution trace: every node output becomes a graph output, the reference
    evaluator runs the model, and each matrix op's MACs come from its real operands.
    """
    from onnx.reference import ReferenceEvaluator

    traced = onnx.ModelProto()
    traced.CopyFrom(model)
    declared = {o.name for o in traced.graph.output}
    extra = [o for n in traced.graph.node for o in n.output if o and o not in declared]
    traced.graph.output.extend(helper.make_empty_tensor_value_info(o) for o in extra)
    names = [o.name for o in traced.graph.output]
    values = dict(zip(names, ReferenceEvaluator(traced).run(None, dict(feeds))))
    values.update(feeds)
    values.update((i.name, numpy_helper.to_array(i)) for i in traced.graph.initializer)
    return sum(_node_macs(n, values) for n in traced.graph.node)


def _node_macs(n: onnx.NodeProto, values: Mapping[str, np.ndarray]) -> int:
    """MACs of one matrix node from its operands (numpy matmul / Gemm / Conv semantics)."""
    if n.op_type in ("MatMul", "MatMulInteger"):
        a, b = (values[i] for i in n.input[:2])
        a2 = a.reshape(1, -1) if a.ndim == 1 else a
        b2 = b.reshape(-1, 1) if b.ndim == 1 else b
        batch = np.broadcast_shapes(a2.shape[:-2], b2.shape[:-2])
        return int(np.prod(batch, dtype=np.int64)) * a2.shape[-2] * a2.shape[-1] * b2.shape[-1]
    if n.op_type == "Gemm":
        y = values[n.output[0]]
        a = values[n.input[0]]
        k = a.shape[0] if _attr(n, "transA") else a.shape[1]
        return int(y.size * k)
    if n.op_type == "Conv":
        y, w = values[n.output[0]], values[n.input[1]]
        return int(y.size * np.prod(w.shape[1:]))
    if n.op_type == "Attention":  # ONNX spec: Q K^T and P V per (batch, query head)
        return _attention_macs(n, values)
    return 0


def _attention_macs(n: onnx.NodeProto, values: Mapping[str, np.ndarray]) -> int:
    """MACs of an executed ONNX Attention node, from its real Q, K, V (and past) arrays."""
    q, k, v = (values[i] for i in n.input[:3])
    if q.ndim == 3:
        q_heads, kv_heads = _attr(n, "q_num_heads"), _attr(n, "kv_num_heads")
        batch, q_len, head = q.shape[0], q.shape[1], q.shape[2] // q_heads
        kv_len, v_head = k.shape[1], v.shape[2] // kv_heads
    else:
        batch, q_heads, q_len, head = q.shape
        kv_len, v_head = k.shape[2], v.shape[3]
    if len(n.input) > 4 and n.input[4]:
        kv_len += values[n.input[4]].shape[2]
    return int(batch * q_heads * q_len * kv_len * (head + v_head))


def _attr(n: onnx.NodeProto, name: str) -> Any:
    return next((helper.get_attribute_value(a) for a in n.attribute if a.name == name), None)


def profile_totals(model: onnx.ModelProto, folder: Any, name: str) -> dict[str, int]:
    """Load ``model`` through the real loader, profile it, and return the totals to compare.

    ``boundary_bytes``: bytes of the graph's activation inputs and outputs (what a
    fused op reads and writes); ``layer_io_bytes``: what the layers read and write
    (a decomposition also moves its intermediates). Every layer must be modelled.
    """
    from gate.model.loader import load_model
    from gate.profile import profile_model

    path = folder / f"{name}.onnx"
    onnx.save(model, str(path))
    profile = profile_model(load_model(path))
    unmodelled = [(layer.name, layer.unmodelled_reason) for layer in profile.layers
                  if not layer.modelled]
    assert unmodelled == []
    graph_tensors = (*profile.model.graph.inputs, *profile.model.graph.outputs)
    return {
        "macs": profile.total_macs, "flops": profile.total_flops,
        "params": profile.total_param_count, "param_bytes": profile.total_param_bytes,
        "boundary_bytes": sum(t.nbytes or 0 for t in graph_tensors),
        "layer_io_bytes": sum(layer.input_bytes + layer.output_bytes for layer in profile.layers),
    }


def assert_fused_equals_decomposition(fused: dict[str, int], parts: dict[str, int]) -> None:
    """The fused op does the decomposition's arithmetic on its parameters, reading and
    writing only the decomposition's boundary tensors."""
    for key in ("macs", "flops", "params", "param_bytes", "boundary_bytes"):
        assert fused[key] == parts[key], key
    assert fused["layer_io_bytes"] == fused["boundary_bytes"]
