"""Guards run before onnx shape inference: refuse what its data propagation cannot hold.

onnx shape inference with data propagation (``data_prop=True``, which the
loader needs for shapes computed from shapes) keeps the *values* of 1-D
tensors that reach an op with a data-propagation function (``Add``, ``Cast``,
``Concat``, ``Gather``, ``Mul``, ``Slice``, ``Squeeze``, ``Sub``, ``Unsqueeze``
in onnx 1.23; asked at run time through ``OpSchema.has_data_propagation_function``),
one protobuf dim per element, in C++. A model whose constants build a vector
of 4e9 elements (``Range(0, 4e9, 1)``) took about 24 GB there and then crashed.
Measured once on onnx 1.23 with ``ru_maxrss``: about 140 bytes per element
(10 million elements -> 1.4 GB, 1 million -> 0.15 GB).

So before inference, ``refuse_huge_shape_data`` computes, from constants and
declared shapes only (never a weight, never a tensor value larger than
gate/model/shape_rules reads), the element count of

* every rank-0/1 output of a node that builds a tensor from constants:
  ``Range`` (start, limit, delta), ``ConstantOfShape`` (shape), ``Expand``
  (input shape broadcast with shape), ``Tile`` (input length x repeats);
* every 1-D tensor whose length the file declares (graph inputs with
  ``--shape``/``--dim`` applied, initializers, value_info, outputs) that feeds an
  op with data propagation,

in the main graph, every subgraph and every local function, and refuses (InputError, exit 2) the
first one above ``MAX_SHAPE_DATA_ELEMENTS``, naming the node, the count and the
limit. Tensors of rank 2 and more are never materialised by data propagation
(checked: a [2, 4e9] input through the same ops infers in milliseconds), so
large masks and feature maps pass. ``huge_shape_data`` answers the same
question without raising, for callers that would rather skip a round of
inference (gate/model/shape_values.py).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import onnx

from gate.errors import InputError
from gate.model.convert import all_graph_protos
from gate.model.shape_rules import constant_node_value, stored_value

# Elements of one 1-D tensor that onnx data propagation may hold (about 150 MB at the
# measured ~140 B per element; shape vectors hold a handful).
MAX_SHAPE_DATA_ELEMENTS = 1 << 20
# Ops whose output is small whatever their input's length (a shape, a count).
_SMALL_OUTPUT_OPS = ("Shape", "Size")
# Ops whose rank-0/1 output ``_built_elements`` sizes from constants.
_BUILDING_OPS = frozenset(("Range", "ConstantOfShape", "Expand", "Tile"))


@dataclass(frozen=True, slots=True)
class HugeShapeData:
    """A 1-D tensor data propagation would hold element by element, and who makes it."""

    node: str  # the node that builds or reads it, as the message names it
    op_type: str
    elements: int
    reads: bool = False  # the node reads it (a declared length) rather than builds it

    def message(self) -> str:
        verb = "reads" if self.reads else "makes"
        fix = ("bind the dim that sizes it smaller (--shape/--dim), or re-export the model"
               if self.reads else "re-export the model without the constant-built vector")
        return (f"node {self.node} ({self.op_type}) {verb} a 1-D tensor of {self.elements:,} "
                f"elements, above the limit of {MAX_SHAPE_DATA_ELEMENTS:,} that onnx shape "
                f"inference may hold value by value (more exhausts memory); {fix}")


def refuse_huge_shape_data(model: onnx.ModelProto, path: str,
                           dims: Mapping[str, int] | None = None,
                           shapes: Mapping[str, Sequence[int]] | None = None) -> None:
    """InputError naming the first tensor ``huge_shape_data`` finds (see the module docstring).

    ``dims`` and ``shapes`` are the ``--dim`` and ``--shape`` bindings inference will see.
    """
    found = huge_shape_data(model, dims, shapes)
    if found is not None:
        raise InputError(found.message(), path)


def huge_shape_data(model: onnx.ModelProto, dims: Mapping[str, int] | None = None,
                    shapes: Mapping[str, Sequence[int]] | None = None) -> HugeShapeData | None:
    """The first 1-D tensor above the limit that inference would hold, or None."""
    opset = next((int(o.version) for o in model.opset_import if o.domain in ("", "ai.onnx")),
                 onnx.defs.onnx_opset_version())
    graphs = [*all_graph_protos(model.graph),  # local functions are inlined before inference
              *(g for f in model.functions for g in all_graph_protos(onnx.GraphProto(node=f.node)))]
    constants = _constants(graphs)
    lengths = _declared_lengths(graphs, dims or {}, shapes or {})
    for current in graphs:
        for node in current.node:
            built = _built_elements(node, constants, lengths)
            if built is not None and built > MAX_SHAPE_DATA_ELEMENTS:
                return HugeShapeData(_node_name(node), node.op_type, built)
            if built is not None and node.output and node.output[0]:
                lengths[node.output[0]] = built
    if not any(length > MAX_SHAPE_DATA_ELEMENTS for length in lengths.values()):
        return None  # no tensor above the limit to read: skip the walk and its schema lookups
    for current in graphs:
        for node in current.node:
            if not _propagates_data(node, opset):
                continue
            for name in node.input:
                if name and lengths.get(name, 0) > MAX_SHAPE_DATA_ELEMENTS:
                    return HugeShapeData(_node_name(node), node.op_type, lengths[name], True)
    return None


def _constants(graphs: Sequence[onnx.GraphProto]) -> dict[str, np.ndarray]:
    """Small stored constants by name (initializers and Constant nodes of every scope)."""
    out: dict[str, np.ndarray] = {}
    for current in graphs:
        for tensor in current.initializer:
            value = stored_value(tensor)
            if value is not None:
                out[tensor.name] = value
        for node in current.node:
            if node.op_type == "Constant" and node.output:
                value = constant_node_value(node)
                if value is not None:
                    out[node.output[0]] = value
    return out


def _declared_lengths(graphs: Sequence[onnx.GraphProto], dims: Mapping[str, int],
                      shapes: Mapping[str, Sequence[int]]) -> dict[str, int]:
    """The length of every 1-D tensor whose size the file (or a binding) fixes."""
    out: dict[str, int] = {}
    for current in graphs:
        for tensor in current.initializer:
            if len(tensor.dims) == 1:
                out[tensor.name] = int(tensor.dims[0])
        for value in (*current.input, *current.value_info, *current.output):
            length = _declared_length(value, dims)
            if length is not None:
                out[value.name] = length
    for name, shape in shapes.items():
        if len(shape) == 1:
            out[name] = int(shape[0])
    return out


def _declared_length(value: onnx.ValueInfoProto, dims: Mapping[str, int]) -> int | None:
    if not value.type.HasField("tensor_type") or not value.type.tensor_type.HasField("shape"):
        return None
    declared = value.type.tensor_type.shape.dim
    if len(declared) != 1:
        return None
    dim = declared[0]
    if dim.HasField("dim_value"):
        return int(dim.dim_value)
    return dims.get(dim.dim_param) if dim.HasField("dim_param") else None


def _built_elements(node: onnx.NodeProto, constants: Mapping[str, np.ndarray],
                    lengths: Mapping[str, int]) -> int | None:
    """Elements of the node's rank-0/1 output when constants fix it (None otherwise)."""
    if node.op_type not in _BUILDING_OPS or node.domain not in ("", "ai.onnx"):
        return None
    inputs = [constants.get(name) if name else None for name in node.input]
    try:
        if node.op_type == "Range" and len(inputs) == 3:
            return _range_count(*inputs)
        if node.op_type == "ConstantOfShape" and inputs and inputs[0] is not None:
            shape = [int(d) for d in inputs[0].reshape(-1)]
            return math.prod(shape) if len(shape) <= 1 else None
        if node.op_type in ("Expand", "Tile") and len(inputs) == 2 and inputs[1] is not None:
            return _rank1_result(node.op_type, _input_length(node.input[0], constants, lengths),
                                 [int(d) for d in inputs[1].reshape(-1)])
    except (ValueError, TypeError, OverflowError, ZeroDivisionError):
        return None
    return None


def _range_count(start: np.ndarray | None, limit: np.ndarray | None,
                 delta: np.ndarray | None) -> int | None:
    """max(ceil((limit - start) / delta), 0): the ONNX operator spec's Range output length."""
    if start is None or limit is None or delta is None or start.size != 1 \
            or limit.size != 1 or delta.size != 1:
        return None
    a, b, step = start.reshape(-1)[0].item(), limit.reshape(-1)[0].item(), \
        delta.reshape(-1)[0].item()
    if not step or not all(math.isfinite(v) for v in (a, b, step)):
        return None
    if all(isinstance(v, int) for v in (a, b, step)):
        return max(-((a - b) // step), 0)  # exact: ceil(x / y) == -(-x // y)
    return max(math.ceil((b - a) / step), 0)


def _input_length(name: str, constants: Mapping[str, np.ndarray],
                  lengths: Mapping[str, int]) -> int | None:
    if name in constants:
        value = constants[name]
        return int(value.size) if value.ndim <= 1 else None
    return lengths.get(name)


def _rank1_result(op_type: str, length: int | None, operand: list[int]) -> int | None:
    """Expand (numpy broadcasting, ONNX spec) or Tile (length x repeats) of a 1-D input."""
    if length is None or len(operand) != 1:
        return None
    if op_type == "Tile":
        return length * operand[0]
    if length != 1 and operand[0] != 1 and length != operand[0]:
        return None  # not broadcastable: inference will say so
    return max(length, operand[0]) if 0 not in (length, operand[0]) else 0


def _propagates_data(node: onnx.NodeProto, opset: int) -> bool:
    """Whether onnx runs a data-propagation function for this node (its output is not a
    shape or a count)."""
    if node.domain not in ("", "ai.onnx") or node.op_type in _SMALL_OUTPUT_OPS:
        return False
    return _schema_propagates(node.op_type, opset)


@functools.lru_cache(maxsize=1024)
def _schema_propagates(op_type: str, opset: int) -> bool:
    """Asked once per (op_type, opset): a schema lookup costs microseconds, graphs repeat ops."""
    try:
        schema = onnx.defs.get_schema(op_type, opset, "")
    except onnx.defs.SchemaError:
        return False
    return bool(getattr(schema, "has_data_propagation_function", False))


def _node_name(node: onnx.NodeProto) -> str:
    output = next((name for name in node.output if name), "")
    return repr(node.name) if node.name else f"making {output!r}"
