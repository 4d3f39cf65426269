"""The immutable graph the rest of roofgate works on: layers (ONNX nodes) and tensors.

Nothing here holds weight values: a tensor is a name, a shape and a dtype.
Dims are Python ints (exact, no overflow) or a ``str`` for a symbolic dim that
no ``--dim`` binding resolved; ``shape is None`` means the rank is unknown.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from math import prod
from typing import Any

Dim = int | str
Shape = tuple[Dim, ...]

# Bytes per element by ONNX TensorProto data type name. Sub-byte types use
# fractional bytes; byte totals are rounded up per tensor (see TensorInfo.nbytes).
DTYPE_BITS: Mapping[str, int] = {
    "FLOAT": 32, "UINT8": 8, "INT8": 8, "UINT16": 16, "INT16": 16, "INT32": 32,
    "INT64": 64, "STRING": 0, "BOOL": 8, "FLOAT16": 16, "DOUBLE": 64, "UINT32": 32,
    "UINT64": 64, "COMPLEX64": 64, "COMPLEX128": 128, "BFLOAT16": 16,
    "FLOAT8E4M3FN": 8, "FLOAT8E4M3FNUZ": 8, "FLOAT8E5M2": 8, "FLOAT8E5M2FNUZ": 8,
    "UINT4": 4, "INT4": 4, "FLOAT4E2M1": 4, "FLOAT8E8M0": 8, "UINT2": 2, "INT2": 2,
}

FLOAT_DTYPES = frozenset({
    "FLOAT", "FLOAT16", "DOUBLE", "BFLOAT16", "FLOAT8E4M3FN", "FLOAT8E4M3FNUZ",
    "FLOAT8E5M2", "FLOAT8E5M2FNUZ", "FLOAT4E2M1", "FLOAT8E8M0",
})


@dataclass(frozen=True, slots=True)
class TensorInfo:
    """A tensor's name, shape and element type; never its values."""

    name: str
    shape: Shape | None
    dtype: str  # ONNX TensorProto data type name, e.g. "FLOAT", "INT8"; "UNDEFINED" if unknown

    @property
    def is_static(self) -> bool:
        """True when every dim is a known non-negative int."""
        return self.shape is not None and all(isinstance(d, int) for d in self.shape)

    @property
    def numel(self) -> int | None:
        """Element count, or None if any dim is unknown or symbolic."""
        if not self.is_static:
            return None
        return prod(self.shape)  # type: ignore[arg-type]

    @property
    def bits_per_element(self) -> int:
        return DTYPE_BITS.get(self.dtype, 0)

    @property
    def nbytes(self) -> int | None:
        """Storage size in bytes at the tensor's own dtype (rounded up), or None."""
        count = self.numel
        if count is None:
            return None
        return (count * self.bits_per_element + 7) // 8

    def symbolic_dims(self) -> tuple[str, ...]:
        if self.shape is None:
            return ()
        return tuple(d for d in self.shape if isinstance(d, str))


@dataclass(frozen=True, slots=True)
class Node:
    """One layer: an ONNX node with its tensors resolved to TensorInfo.

    ``inputs`` keeps ONNX input positions; an omitted optional input ("") is None.
    ``param_inputs`` lists the input positions fed by an initializer (a parameter).
    ``attributes`` holds plain Python values (ints, floats, strings, lists);
    graph-valued attributes (If/Loop/Scan bodies) are in ``subgraphs`` by attribute name.
    ``const_values`` holds the values of small integer inputs known statically (an
    initializer or Constant of at most 64 elements stored inline: shapes, axes, trip
    counts, a boolean condition); weights are never read.
    """

    index: int
    name: str
    op_type: str
    domain: str
    inputs: tuple[TensorInfo | None, ...]
    outputs: tuple[TensorInfo, ...]
    attributes: Mapping[str, Any] = field(default_factory=dict)
    param_inputs: frozenset[int] = frozenset()
    subgraphs: Mapping[str, Graph] = field(default_factory=dict)
    const_values: Mapping[int, tuple[int, ...]] = field(default_factory=dict)

    def attr(self, name: str, default: Any = None) -> Any:
        return self.attributes.get(name, default)

    def input(self, position: int) -> TensorInfo | None:
        return self.inputs[position] if position < len(self.inputs) else None

    def is_param(self, position: int) -> bool:
        return position in self.param_inputs


@dataclass(frozen=True, slots=True)
class Graph:
    """A topologically ordered list of layers plus the graph's parameters and I/O."""

    nodes: tuple[Node, ...]
    initializers: Mapping[str, TensorInfo]
    inputs: tuple[TensorInfo, ...]
    outputs: tuple[TensorInfo, ...]


@dataclass(frozen=True, slots=True)
class LoadedModel:
    """A model file loaded for profiling: the graph and facts about the file."""

    path: str
    name: str  # the graph name, or the file stem when the graph has none
    graph: Graph
    opsets: Mapping[str, int]  # domain ("" = ai.onnx) -> opset version
    ir_version: int
    producer: str
    dim_bindings: Mapping[str, int]  # symbolic dims bound from --dim/config
    unbound_dims: tuple[str, ...]  # symbolic dims still unresolved somewhere in the graph
    warnings: tuple[str, ...] = ()  # e.g. external data outside the model folder (never opened)
    shape_bindings: Mapping[str, tuple[int, ...]] = field(default_factory=dict)  # --shape/config
