"""Convert an (already inferred) ONNX ``ModelProto`` into the immutable ``gate.model.graph`` types.

Reads shapes and dtypes only. The one exception is ``Node.const_values``: integer
and boolean constants of at most ``CONST_VALUE_LIMIT`` elements stored inline
(shape tensors, axes, trip counts, conditions) are read, because cost functions
need them; a tensor with external data is never read.

Parameters (``Node.param_inputs``) are inputs constant at inference: initializers,
Constant nodes and tensors folded from constants alone (``gate.model.constants``
decides what folds, how each constant is stored, and which constants are
metadata rather than parameters). Folded nodes, absorbed activation
QuantizeLinear -> DequantizeLinear pairs and unused outputs are marked on the
``Node``.

Dims: an int, a symbolic name (``str``), or ``UNKNOWN_DIM`` ("?") when neither a
value nor a name is known; a negative dim value is treated as unknown.
"""

from __future__ import annotations

import os
from collections import ChainMap
from collections.abc import Iterable, Iterator, Mapping
from types import MappingProxyType
from typing import Any

import onnx
from onnx import AttributeProto, TensorProto, helper, numpy_helper

from gate.errors import InputError
from gate.model.constants import (
    CONST_VALUE_LIMIT,
    constant_node_info,
    folded_sources,
    folds,
    is_parameter,
    small_values,
)
from gate.model.graph import Graph, Node, ParamSource, Shape, TensorInfo, stored_as_itself
from gate.model.order import OrderScan

UNKNOWN_DIM = "?"
MAX_SUBGRAPH_DEPTH = 64
_SUBGRAPH_READER = "<subgraph>"  # a consumer that is a body graph (or a graph output)
_QDQ_OPS = frozenset({"QuantizeLinear", "DequantizeLinear"})  # what ``_Walk.absorbs_qdq`` absorbs

_INT_DTYPES = frozenset({"INT8", "UINT8", "INT16", "UINT16", "INT32", "UINT32", "INT64",
                         "UINT64", "BOOL", "INT4", "UINT4"})
_Scope = ChainMap[str, Any]  # name -> value, innermost scope first
_NO_POSITIONS: frozenset[int] = frozenset()
# One read-only empty mapping shared by every node without attributes, subgraphs, ...
# (a dict each costs 64 bytes per field per node: megabytes on large graphs).
_NOTHING: Mapping[Any, Any] = MappingProxyType({})


def dtype_name(elem_type: int) -> str:
    """ONNX TensorProto data type name, or "UNDEFINED" for an unknown enum value."""
    name = _DTYPE_NAMES.get(elem_type)
    if name is None:
        try:
            name = TensorProto.DataType.Name(elem_type)
        except ValueError:
            name = "UNDEFINED"
        _DTYPE_NAMES[elem_type] = name
    return name


_DTYPE_NAMES: dict[int, str] = {}  # enum value -> name (asked once per tensor otherwise)


def _dims(shape: onnx.TensorShapeProto, declared: frozenset[str] | None) -> tuple[int | str, ...]:
    out: list[int | str] = []
    for dim in shape.dim:
        kind = dim.WhichOneof("value")  # one call instead of two HasField
        if kind == "dim_value" and dim.dim_value >= 0:
            out.append(int(dim.dim_value))
        elif kind == "dim_param" and dim.dim_param and (
                declared is None or dim.dim_param in declared):
            out.append(dim.dim_param)
        else:
            out.append(UNKNOWN_DIM)
    return tuple(out)


def value_info(value: onnx.ValueInfoProto, declared: frozenset[str] | None = None) -> TensorInfo:
    """A ValueInfoProto as TensorInfo; non-tensor types (sequence, map, optional) have no shape.

    A ``dim_param`` not in ``declared`` (when given) was invented by shape
    inference for a data-dependent dim; no ``--dim`` can bind it, so it is unknown.
    """
    kind = value.type.WhichOneof("value")
    if kind not in ("tensor_type", "sparse_tensor_type"):
        return TensorInfo(value.name, None, "UNDEFINED")
    tensor = getattr(value.type, kind)
    shape = _dims(tensor.shape, declared) if tensor.HasField("shape") else None
    return TensorInfo(value.name, shape, dtype_name(tensor.elem_type))


def tensor_info(tensor: TensorProto, name: str | None = None) -> TensorInfo:
    """An initializer's (or tensor attribute's) TensorInfo from its dims and dtype only."""
    return TensorInfo(tensor.name if name is None else name,
                      tuple(int(d) for d in tensor.dims), dtype_name(tensor.data_type))


def _small_int_values(tensor: TensorProto) -> tuple[int, ...] | None:
    """Values of a small inline integer/boolean tensor, else None (weights are never read)."""
    if dtype_name(tensor.data_type) not in _INT_DTYPES:
        return None
    if tensor.data_location == TensorProto.EXTERNAL:
        return None
    count = 1
    for dim in tensor.dims:
        count *= int(dim)
    if count > CONST_VALUE_LIMIT or count < 0:
        return None
    try:
        return tuple(int(v) for v in numpy_helper.to_array(tensor).reshape(-1).tolist())
    except Exception:  # noqa: BLE001  (malformed inline data: simply not known statically)
        return None


class _Converter:
    """Converts one model; holds the per-model state (warnings, opset)."""

    def __init__(self, path: str, declared: frozenset[str] | None, opset: int) -> None:
        self.path = path
        self.declared = declared
        self.opset = opset
        self.warnings: list[str] = []
        self.types: dict[bytes, tuple[Shape | None, str]] = {}  # see _value_info

    def graph(self, proto: onnx.GraphProto, outer: dict[str, _Scope] | None,
              depth: int) -> Graph:
        if depth > MAX_SUBGRAPH_DEPTH:
            raise InputError(f"subgraphs nested deeper than {MAX_SUBGRAPH_DEPTH} levels; "
                             f"simplify the model's control flow", self.path)
        infos: dict[str, TensorInfo] = {}
        sources: dict[str, ParamSource] = {}
        consts: dict[str, tuple[int, ...]] = {}
        initializers = self._initializers(proto, infos, sources, consts)
        inputs = tuple(value_info(v, self.declared) for v in proto.input
                       if v.name not in initializers)
        for value in (*proto.input, *proto.value_info, *proto.output):
            name = value.name
            if name not in infos and (name not in initializers
                                      or value.type.tensor_type.HasField("shape")):
                infos[name] = self._value_info(value)
        scan = OrderScan(proto, self.path)
        readers = _scan_nodes(proto, infos, consts, scan)
        local_known = {v.name for v in proto.input} | set(initializers)
        outer_infos = None if outer is None else outer["infos"]
        order = scan.order(lambda name: name in local_known or (outer_infos is not None
                                                                 and name in outer_infos))
        del scan  # its map of every produced name is not needed while the nodes are built
        ctx = {name: _chain(local if outer is None else outer[name].new_child(local))
               for name, local in (("infos", infos), ("sources", sources), ("consts", consts))}
        walk = _Walk(ctx, readers, set())
        nodes = tuple(self._node(index, proto.node[i], walk, depth)
                      for index, i in enumerate(order))
        return Graph(nodes=nodes, initializers=initializers, inputs=inputs,
                     outputs=tuple(ctx["infos"].get(v.name) or value_info(v, self.declared)
                                   for v in proto.output))

    def _value_info(self, value: onnx.ValueInfoProto) -> TensorInfo:
        """``value_info``, its shape and dtype remembered by the type's bytes (a graph's
        tensors share a few types; reading a shape dim by dim costs microseconds)."""
        key = value.type.SerializeToString()
        known = self.types.get(key)
        if known is None:
            info = value_info(value, self.declared)
            self.types[key] = (info.shape, info.dtype)
            return info
        return TensorInfo(value.name, known[0], known[1])

    def _initializers(self, proto: onnx.GraphProto, infos: dict[str, TensorInfo],
                      sources: dict[str, ParamSource],
                      consts: dict[str, tuple[int, ...]]) -> dict[str, TensorInfo]:
        found: dict[str, TensorInfo] = {}
        duplicates: dict[str, int] = {}
        pairs = [(t, tensor_info(t)) for t in proto.initializer]
        pairs += [(s.values, tensor_info(s.values, s.values.name)) for s in proto.sparse_initializer]
        for index, (tensor, info) in enumerate(pairs):
            if index >= len(proto.initializer):  # sparse: the dense shape is the tensor's shape
                sparse = proto.sparse_initializer[index - len(proto.initializer)]
                info = TensorInfo(info.name, tuple(int(d) for d in sparse.dims), info.dtype)
            previous = found.get(info.name)
            if previous is not None:
                if previous != info:
                    raise InputError(f"two initializers named '{info.name}' with different "
                                     f"shapes or types; re-export the model", self.path)
                duplicates[info.name] = duplicates.get(info.name, 1) + 1
                continue
            found[info.name] = info
            values = _small_int_values(tensor)
            if values is not None:
                consts[info.name] = values
        for name, count in duplicates.items():
            self.warnings.append(f"{count} initializers share the name '{name}' (identical; "
                                 f"counted once)")
        infos.update(found)
        sources.update((name, stored_as_itself(info)) for name, info in found.items())
        return found

    def _node(self, index: int, proto: onnx.NodeProto, walk: _Walk, depth: int) -> Node:
        infos, sources, consts = walk.infos, walk.sources, walk.consts
        input_names = list(proto.input)  # one read of the protobuf field (reads are not free)
        # list comprehensions, not generators: this runs once per node of a large graph
        inputs = tuple([None if not name else infos.get(name) or TensorInfo(name, None, "UNDEFINED")
                        for name in input_names])
        output_names = list(proto.output)
        outputs = tuple([infos.get(name) or TensorInfo(name, None, "UNDEFINED") if name
                         else TensorInfo("", None, "UNDEFINED") for name in output_names])
        proto_attributes = proto.attribute
        attributes, subgraphs = (self._attributes(proto_attributes, walk, depth)
                                 if len(proto_attributes) else (_NOTHING, _NOTHING))
        op_type, domain = proto.op_type, proto.domain
        folded = folds(proto, op_type, domain, input_names, sources)
        if folded:
            outputs = self._fold(proto, inputs, outputs, walk)
        input_sources = {i: sources[n] for i, n in enumerate(input_names) if n and n in sources}
        params = [i for i, source in input_sources.items()
                  if is_parameter(op_type, i, inputs[i], source)] if input_sources else ()
        readers = walk.readers
        unused = [i for i, n in enumerate(output_names) if n and n not in readers]
        name = proto.name
        used_names = walk.used_names
        if name and name not in used_names:  # the common case, without two calls
            used_names.add(name)
        else:
            name = walk.unique_name(name, op_type, index)
        return Node(
            index=index,
            name=name,
            op_type=op_type,
            domain="" if domain == "ai.onnx" else domain,
            inputs=inputs,
            outputs=outputs,
            attributes=attributes,
            param_inputs=frozenset(params) if params else _NO_POSITIONS,
            subgraphs=subgraphs,
            const_values={i: consts[n] for i, n in enumerate(input_names)
                          if n and n in consts} or _NOTHING,
            param_sources=input_sources or _NOTHING,
            folded=folded,
            qdq_absorbed=(not folded and op_type in _QDQ_OPS  # most nodes: no call
                          and walk.absorbs_qdq(op_type, domain, input_names, output_names)),
            unused_outputs=frozenset(unused) if unused else _NO_POSITIONS,
        )

    def _attributes(self, proto_attributes: Iterable[onnx.AttributeProto], walk: _Walk,
                    depth: int) -> tuple[Mapping[str, Any], Mapping[str, Graph]]:
        """A node's plain attributes and its converted subgraphs (by attribute name)."""
        attributes: dict[str, Any] = {}
        subgraphs: dict[str, Graph] = {}
        for attribute in proto_attributes:
            if attribute.type == AttributeProto.GRAPH:
                subgraphs[attribute.name] = self.graph(attribute.g, walk.ctx, depth + 1)
            elif attribute.type == AttributeProto.GRAPHS:
                for i, sub in enumerate(attribute.graphs):
                    subgraphs[f"{attribute.name}[{i}]"] = self.graph(sub, walk.ctx, depth + 1)
            else:
                attributes[attribute.name] = _plain_attribute(attribute)
        return attributes or _NOTHING, subgraphs or _NOTHING

    def _fold(self, proto: onnx.NodeProto, inputs: tuple[TensorInfo | None, ...],
              outputs: tuple[TensorInfo, ...], walk: _Walk) -> tuple[TensorInfo, ...]:
        """Register the outputs of a folding node as constants (how stored, small values)."""
        sources, consts = walk.local("sources"), walk.local("consts")
        if proto.op_type == "Constant":
            declared = constant_node_info(proto)
            if declared is not None and outputs and not outputs[0].is_static:
                outputs = (declared, *outputs[1:])
            given = [None] * len(inputs)
        else:
            given = [walk.scope("sources").get(t.name) if t is not None else None for t in inputs]
        for info, source in zip(outputs, folded_sources(proto.op_type, given, outputs)):
            if info.name:
                sources[info.name] = source
        if proto.op_type != "Constant":
            known = walk.scope("consts")
            values = [known.get(t.name) if t is not None else None for t in inputs]
            consts.update(small_values(proto, inputs, values, outputs, self.opset))
        return outputs


class _Walk:
    """The state of converting one graph's nodes in order: scopes, readers, absorbed Q/DQ pairs."""

    def __init__(self, ctx: dict[str, _Scope], readers: Mapping[str, frozenset[str]],
                 used_names: set[str]) -> None:
        self.ctx = ctx
        self.readers = readers
        self.used_names = used_names
        self.absorbed_quantized: set[str] = set()
        self.nested = len(ctx["infos"].maps) > 1
        self.infos = self.scope("infos")  # looked up for every node: resolved once
        self.sources = self.scope("sources")
        self.consts = self.scope("consts")

    def scope(self, name: str) -> Any:
        """The scope for lookups: the plain dict at the top level (fast), chained inside subgraphs."""
        return self.ctx[name] if self.nested else self.ctx[name].maps[0]

    def local(self, name: str) -> Any:
        return self.ctx[name].maps[0]

    def absorbs_qdq(self, op_type: str, domain: str, input_names: list[str],
                    output_names: list[str]) -> bool:
        """An activation QuantizeLinear read only by DequantizeLinear nodes, and those nodes."""
        if domain not in ("", "ai.onnx") or not output_names:
            return False
        if op_type == "QuantizeLinear":
            readers = self.readers.get(output_names[0], frozenset())
            if readers and readers == {"DequantizeLinear"}:
                self.absorbed_quantized.add(output_names[0])
                return True
            return False
        return (op_type == "DequantizeLinear" and bool(input_names)
                and input_names[0] in self.absorbed_quantized)

    def unique_name(self, name: str, op_type: str, index: int) -> str:
        return _unique_name(name, op_type, index, self.used_names)


def _scan_nodes(proto: onnx.GraphProto, infos: dict[str, TensorInfo],
                consts: dict[str, tuple[int, ...]], scan: OrderScan) -> _Readers:
    """One walk of the graph's nodes: every produced name goes in scope (shaped or not),
    Constant nodes' small integer values into ``consts``, the edges into ``scan`` (the
    topological order); returns the readers: tensor name -> op types of the nodes that
    read it (graph outputs and names read inside body graphs are read by
    ``_SUBGRAPH_READER``)."""
    readers = _Readers()
    for index, node in enumerate(proto.node):
        input_names, output_names = list(node.input), list(node.output)
        scan.read(index, input_names)
        scan.produce(index, output_names)
        for name in output_names:
            if name and name not in infos:
                infos[name] = TensorInfo(name, None, "UNDEFINED")
        domain, op_type = node.domain, node.op_type
        if domain in ("", "ai.onnx"):
            if op_type == "Constant":
                _constant_value(node, consts)
        else:
            op_type = f"{domain}.{op_type}"
        for name in input_names:
            if name:
                readers.add(name, op_type)
        attributes = node.attribute
        for attribute in attributes if len(attributes) else ():
            if attribute.type == AttributeProto.GRAPH:
                bodies = [attribute.g]
            elif attribute.type == AttributeProto.GRAPHS:
                bodies = list(attribute.graphs)
            else:
                continue
            for body in bodies:
                for name in _names_read_in(body):
                    readers.add(name, _SUBGRAPH_READER)
    for value in proto.output:
        readers.add(value.name, _SUBGRAPH_READER)
    return readers


class _Readers(dict[str, frozenset[str]]):
    """Tensor name -> the op types of the nodes that read it.

    The sets are shared: one frozenset per distinct combination (a set per tensor was
    the largest transient allocation while converting a large graph).
    """

    def __init__(self) -> None:
        super().__init__()
        self.distinct: dict[frozenset[str], frozenset[str]] = {}
        self.single: dict[str, frozenset[str]] = {}  # op type -> its one-type set (most names)

    def add(self, name: str, op_type: str) -> None:
        known = self.get(name)
        if known is None:  # a name's first reader: no set built
            types = self.single.get(op_type)
            if types is None:
                types = self.single[op_type] = self._distinct(frozenset((op_type,)))
            self[name] = types
        elif op_type not in known:
            self[name] = self._distinct(known | {op_type})

    def _distinct(self, types: frozenset[str]) -> frozenset[str]:
        return self.distinct.setdefault(types, types)


def _names_read_in(graph: onnx.GraphProto) -> set[str]:
    names: set[str] = set()
    for current in all_graph_protos(graph):
        for node in current.node:
            names.update(n for n in node.input if n)
        names.update(v.name for v in current.output)
    return names


def _constant_value(node: onnx.NodeProto, consts: dict[str, tuple[int, ...]]) -> None:
    """The small integer value of a Constant node (metadata the cost functions read)."""
    if not node.output:
        return
    for attribute in node.attribute:
        if attribute.name == "value" and attribute.type == AttributeProto.TENSOR:
            values = _small_int_values(attribute.t)
            if values is not None:
                consts[node.output[0]] = values
        elif attribute.name == "value_int":
            consts[node.output[0]] = (int(attribute.i),)
        elif attribute.name == "value_ints" and len(attribute.ints) <= CONST_VALUE_LIMIT:
            consts[node.output[0]] = tuple(int(v) for v in attribute.ints)


def _chain(scope: Any) -> _Scope:
    return scope if isinstance(scope, ChainMap) else ChainMap(scope)


def _unique_name(name: str, op_type: str, index: int, used: set[str]) -> str:
    """The node's name; unnamed nodes get ``<op_type>_<index>``, repeats a ``~N`` suffix."""
    base = name or f"{op_type}_{index}"
    candidate, n = base, 1
    while candidate in used:
        n += 1
        candidate = f"{base}~{n}"
    used.add(candidate)
    return candidate


def _plain_attribute(attribute: AttributeProto) -> Any:
    """A non-graph attribute as a plain Python value (tensors as TensorInfo, never values)."""
    if attribute.type == AttributeProto.TENSOR:
        return tensor_info(attribute.t)
    if attribute.type == AttributeProto.SPARSE_TENSOR:
        return TensorInfo(attribute.sparse_tensor.values.name,
                          tuple(int(d) for d in attribute.sparse_tensor.dims),
                          dtype_name(attribute.sparse_tensor.values.data_type))
    if attribute.type == AttributeProto.TENSORS:
        return [tensor_info(t) for t in attribute.tensors]
    if attribute.type in (AttributeProto.TYPE_PROTO, AttributeProto.TYPE_PROTOS):
        return str(helper.get_attribute_value(attribute))
    value = helper.get_attribute_value(attribute)
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, list):
        return [v.decode("utf-8", errors="replace") if isinstance(v, bytes) else v for v in value]
    return value


def convert_model(proto: onnx.ModelProto, path: str,
                  declared: frozenset[str] | None = None) -> tuple[Graph, list[str]]:
    """The model's main graph and the warnings found while converting it.

    ``declared``: the symbolic dims the file itself declares (before inference).
    """
    opset = next((int(o.version) for o in proto.opset_import if o.domain in ("", "ai.onnx")), 0)
    converter = _Converter(path, declared, opset)
    graph = converter.graph(proto.graph, None, 0)
    return graph, converter.warnings


def all_graph_protos(graph: onnx.GraphProto) -> Iterator[onnx.GraphProto]:
    """``graph`` and every subgraph nested in its nodes' attributes (depth first)."""
    stack = [graph]
    while stack:
        current = stack.pop()
        yield current
        for node in current.node:
            if not len(node.attribute):  # most nodes: no attribute to look into
                continue
            for attribute in node.attribute:
                if attribute.HasField("g"):
                    stack.append(attribute.g)
                stack.extend(attribute.graphs)


_DATA_FIELDS = ("raw_data", "float_data", "int32_data", "string_data", "int64_data",
                "double_data", "uint64_data")
_SHAPE_DTYPES = frozenset({TensorProto.INT64, TensorProto.INT32})


def drop_weight_values(graph: onnx.GraphProto) -> None:
    """Clear the values of inline initializers nobody needs the values of (all scopes).

    Keeps dims and dtype, so shapes and byte counts are unchanged, and keeps
    integer tensors small enough to be shapes or indices (data propagation may
    read them). Shape inference then copies kilobytes instead of the weights.
    """
    for current in all_graph_protos(graph):
        for tensor in current.initializer:
            if tensor.data_location != TensorProto.EXTERNAL:
                drop_tensor_values(tensor)


def drop_tensor_values(tensor: TensorProto) -> None:
    """Clear one inline initializer's values unless it is small or may be a shape."""
    count = 1
    for dim in tensor.dims:
        count *= int(dim)
    if count <= CONST_VALUE_LIMIT or (tensor.data_type in _SHAPE_DTYPES
                                      and count <= 64 * CONST_VALUE_LIMIT):
        return
    for name in _DATA_FIELDS:
        tensor.ClearField(name)


def graph_symbolic_dims(graph: Graph) -> set[str]:
    """Every symbolic dim left on a tensor of ``graph`` or its subgraphs."""
    shapes: set[Shape] = set()  # graphs repeat shapes: look at each distinct one once
    stack = [graph]
    while stack:
        current = stack.pop()
        shapes.update(t.shape for t in current.inputs if t.shape)
        for node in current.nodes:
            for maybe in (*node.inputs, *node.outputs):  # an omitted optional input is None
                if maybe is not None and maybe.shape:
                    shapes.add(maybe.shape)
            if node.subgraphs:
                stack.extend(node.subgraphs.values())
    return {d for shape in shapes for d in shape if isinstance(d, str)}


def external_data_warning(tensor: TensorProto, root: str) -> str:
    """A warning for an external-data location outside the folder ``root`` (a real path),
    or "" (the data is never opened either way)."""
    location = next((e.value for e in tensor.external_data if e.key == "location"), "")
    try:
        target = os.path.realpath(os.path.join(root, location)) if location else ""
    except (ValueError, OSError):  # e.g. an embedded NUL: no file system path at all
        target = ""
    if not target:
        return (f"initializer '{tensor.name}' has an unusable external-data "
                f"location ({location!r}); not opened (roofgate reads no "
                f"weights), but re-export the model before shipping it")
    if os.path.isabs(location) or os.path.commonpath([root, target]) != root:
        return (f"initializer '{tensor.name}' points its external data outside "
                f"the model's folder ('{location}'); not opened (roofgate "
                f"reads no weights), but do not ship such a model")
    return ""
