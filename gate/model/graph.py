"""The immutable graph the rest of roofgate works on: layers (ONNX nodes) and tensors.

Nothing here holds weight values: a tensor is a name, a shape and a dtype.
Dims are Python ints (exact, no overflow) or a ``str`` for a symbolic dim that
no ``--dim`` binding resolved; ``shape is None`` means the rank is unknown.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from math import prod
from typing import Any, TypeVar

# ONNX dims and element counts are int64 (protobuf); no size, dim or count may exceed this.
INT64_MAX = 2**63 - 1

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


R = TypeVar("R")


def cached_call(cached: Callable[..., R], *args: Any) -> R:
    """``cached(*args)`` for an ``lru_cache`` function of shapes (graphs repeat a few);
    when an argument is unhashable (a list for a shape in a hand-built TensorInfo or
    profile) the function runs uncached."""
    try:
        return cached(*args)
    except TypeError:
        return cached.__wrapped__(*args)  # type: ignore[attr-defined,no-any-return]


def static_numel(shape: Shape) -> int | None:
    """The element count of ``shape``, or None when a dim is not a known int."""
    return cached_call(_static_numel, shape)


@lru_cache(maxsize=1 << 16)  # a graph's tensors share a few shapes; asked many times per layer
def _static_numel(shape: Shape) -> int | None:
    for dim in shape:
        if not isinstance(dim, int):
            return None
    return prod(shape)  # type: ignore[arg-type,return-value]


@dataclass(frozen=True, slots=True)
class TensorInfo:
    """A tensor's name, shape and element type; never its values."""

    name: str
    shape: Shape | None
    dtype: str  # ONNX TensorProto data type name, e.g. "FLOAT", "INT8"; "UNDEFINED" if unknown

    @property
    def is_static(self) -> bool:
        """True when every dim is a known non-negative int."""
        return self.numel is not None

    @property
    def numel(self) -> int | None:
        """Element count, or None if any dim is unknown or symbolic."""
        shape = self.shape
        if shape.__class__ is tuple:  # asked for every tensor of every layer: no extra call
            return _static_numel(shape)
        return None if shape is None else static_numel(shape)

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
class StoredTensor:
    """A constant as the deployed model stores it: an initializer, a Constant node's
    value, or a tensor a folding node materialises (a ConstantOfShape fill, a product
    of two constants). ``bits`` is the stored element size (int8 behind a
    DequantizeLinear stays 8); ``numel`` is None when its shape is unknown."""

    name: str
    numel: int | None
    bits: int
    dtype: str  # stored ONNX data type name

    @property
    def nbytes(self) -> int:
        return 0 if self.numel is None else (self.numel * self.bits + 7) // 8


@dataclass(frozen=True, slots=True)
class ParamSource:
    """How a constant tensor a layer reads is stored: which stored tensors it comes
    from (through views, slices, concatenations and casts folded offline), how many
    elements the layer reads and at how many bits each is stored."""

    stored: tuple[StoredTensor, ...]
    numel: int | None  # elements of the tensor the layer reads (None: unknown)
    bits: int
    dtype: str  # stored data type of those elements

    @property
    def stored_bytes(self) -> int:
        return sum(s.nbytes for s in self.stored)

    def read_elements(self) -> int:
        """Elements the layer reads, never more than the stored tensors hold; all of
        them when the element count is unknown."""
        stored = 0
        for tensor in self.stored:
            stored += tensor.numel or 0
        if self.numel is None:
            return stored
        return min(self.numel, stored) if stored else self.numel

    def read_bytes(self, bits: int | None = None) -> int:
        """Bytes the layer reads at ``bits`` per element (default: as stored)."""
        return (self.read_elements() * (self.bits if bits is None else bits) + 7) // 8


def stored_as_itself(tensor: TensorInfo) -> ParamSource:
    """The source of a constant stored as it is (an initializer read directly)."""
    stored = StoredTensor(tensor.name, tensor.numel, tensor.bits_per_element, tensor.dtype)
    return ParamSource((stored,), tensor.numel, tensor.bits_per_element, tensor.dtype)


@dataclass(frozen=True, slots=True)
class Node:
    """One layer: an ONNX node with its tensors resolved to TensorInfo.

    ``inputs`` keeps ONNX input positions; an omitted optional input ("") is None.
    ``param_inputs`` lists the input positions fed by a parameter: a tensor constant at
    inference (initializer, Constant node, or folded from constants), except small
    integer metadata (shapes, axes) and quantization scales and zero points;
    ``param_sources`` says how every constant input is stored, metadata included
    (``gate.model.constants``).
    ``attributes`` holds plain Python values (ints, floats, strings, lists);
    graph-valued attributes (If/Loop/Scan bodies) are in ``subgraphs`` by attribute name.
    ``const_values`` holds the values of small integer inputs known statically (an
    initializer or Constant of at most 64 elements stored inline: shapes, axes, trip
    counts, a boolean condition); weights are never read.
    ``folded``: every input is constant, so a deploying runtime computes this node
    offline; it is not a layer of the deployed model. ``qdq_absorbed``: an activation
    QuantizeLinear -> DequantizeLinear pair the neighbouring layers absorb.
    ``unused_outputs``: output positions nothing reads (a Dropout mask, training
    outputs of BatchNormalization); their shapes do not matter.
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
    param_sources: Mapping[int, ParamSource] = field(default_factory=dict)
    folded: bool = False
    qdq_absorbed: bool = False
    unused_outputs: frozenset[int] = frozenset()

    def attr(self, name: str, default: Any = None) -> Any:
        return self.attributes.get(name, default)

    def input(self, position: int) -> TensorInfo | None:
        return self.inputs[position] if position < len(self.inputs) else None

    def is_param(self, position: int) -> bool:
        return position in self.param_inputs

    def param_source(self, position: int) -> ParamSource | None:
        """How parameter input ``position`` is stored (itself when nothing says otherwise)."""
        if position not in self.param_inputs:
            return None
        source = self.param_sources.get(position)
        tensor = self.input(position)
        if source is None and tensor is not None:
            source = stored_as_itself(tensor)
        return source


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
    unused_bindings: tuple[str, ...] = ()  # bound dims this model does not declare (typos?)
