"""Shape values: small tensors computed from tensor shapes at run time, evaluated offline.

Exporters often compute a Reshape target, Pad amounts or a Range limit from
``Shape(x)`` through arithmetic that onnx shape inference's data propagation does
not follow (integer Div and Mod, ConstantOfShape, Range, a Cast through float,
Where ...), so every tensor downstream loses its size. ``refine_shapes`` walks
the main graph once in topological order: it evaluates that arithmetic on
concrete values (the rules of ``gate.model.shape_rules``) and, for a node whose
output is still unsized, asks onnx's own per-node inference again with the
values now known (so a chain of such Reshapes is sized in one walk). The values
are then handed to whole-model onnx shape inference as constants on a scratch
copy; its shapes are kept when they size more tensors, and the walk repeats
while that helps. The graph itself is unchanged: the nodes that compute the
values are still layers, only their consumers' shapes become known.

Only the main graph's nodes are evaluated; subgraphs keep what onnx infers.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import onnx
from onnx import AttributeProto, helper, numpy_helper

from gate.model.guards import huge_shape_data
from gate.model.order import topological_order
from gate.model.shape_rules import Value, evaluate_node, stored_value

MAX_ROUNDS = 8  # walks of evaluate-then-infer; each must size something new

Types = dict[str, onnx.TypeProto]


# ------------------------------------------------------------------ what is sized

def _dim_is_sized(dim: onnx.TensorShapeProto.Dimension, declared: frozenset[str]) -> bool:
    if dim.HasField("dim_value"):
        return dim.dim_value >= 0
    return dim.HasField("dim_param") and dim.dim_param in declared


def _type_is_sized(value_type: onnx.TypeProto | None, declared: frozenset[str]) -> bool:
    """Sized: a tensor whose every dim is a value or a symbolic dim the file declares.

    Non-tensor values (sequences, maps, optionals) count as sized: values cannot help them.
    """
    if value_type is None:
        return False
    if not value_type.HasField("tensor_type"):
        return True
    tensor = value_type.tensor_type
    return tensor.HasField("shape") and all(_dim_is_sized(d, declared) for d in tensor.shape.dim)


def unsized_names(graph: onnx.GraphProto, declared: frozenset[str]) -> set[str]:
    """Node outputs of the main graph without a known rank or with a dim nobody can name."""
    # Graphs repeat a few types many times, and reading a type's dims from protobuf costs far
    # more than serialising it: equal bytes parse to the same type, so ask once per encoding.
    by_encoding: dict[bytes, bool] = {}
    sized = {}
    for value in (*graph.value_info, *graph.output):
        encoding = value.type.SerializeToString()
        known = by_encoding.get(encoding)
        if known is None:
            known = by_encoding[encoding] = _type_is_sized(value.type, declared)
        sized[value.name] = known
    return {name for node in graph.node for name in node.output
            if name and not sized.get(name, False)}


def _static_shape(value_type: onnx.TypeProto | None) -> tuple[int, ...] | None:
    if value_type is None or not value_type.HasField("tensor_type"):
        return None
    tensor = value_type.tensor_type
    dims = tensor.shape.dim
    if not tensor.HasField("shape") or not all(d.HasField("dim_value") and d.dim_value >= 0
                                               for d in dims):
        return None
    return tuple(int(d.dim_value) for d in dims)


# ------------------------------------------------------------------ one walk over the graph

def _known_types(graph: onnx.GraphProto) -> Types:
    types: Types = {t.name: helper.make_tensor_type_proto(t.data_type, list(t.dims))
                    for t in graph.initializer}
    for value in (*graph.input, *graph.value_info, *graph.output):
        types[value.name] = value.type
    return types


def _stored_values(graph: onnx.GraphProto) -> dict[str, Value]:
    values = {}
    for tensor in graph.initializer:
        value = stored_value(tensor)
        if value is not None:
            values[tensor.name] = value
    return values


def _evaluate(node: onnx.NodeProto, values: Mapping[str, Value], types: Types) -> Value | None:
    """The value of the node's first output, or None when a rule cannot give it."""
    return evaluate_node(node, values, lambda name: _static_shape(types.get(name)))


class _Walk:
    """One topological walk: values by tensor name, and types re-inferred where unsized."""

    def __init__(self, model: onnx.ModelProto, declared: frozenset[str]) -> None:
        self.declared = declared
        self.opsets = {o.domain or "": int(o.version) for o in model.opset_import}
        self.opset_imports = list(model.opset_import)
        self.ir_version = int(model.ir_version)
        self.types = _known_types(model.graph)
        self.values = _stored_values(model.graph)
        self.stored = set(self.values)
        self.improved: set[str] = set()  # tensors this walk sized that inference had not

    def node(self, node: onnx.NodeProto) -> None:
        if self._news_for(node) and any(o and not _type_is_sized(self.types.get(o), self.declared)
                                        for o in node.output):
            self._infer_node(node)
        if len(node.output) == 1 and node.output[0]:
            result = _evaluate(node, self.values, self.types)
            if result is not None:
                self.values[node.output[0]] = result

    def _news_for(self, node: onnx.NodeProto) -> bool:
        """Whether the walk knows something about the node's inputs that inference did not:
        a value it computed, or a type it sized (else asking again gives the same answer)."""
        return any(n in self.improved or (n in self.values and n not in self.stored)
                   for n in node.input)

    def _infer_node(self, node: onnx.NodeProto) -> None:
        """onnx's own inference of one node, given the values known so far."""
        if any(a.type in (AttributeProto.GRAPH, AttributeProto.GRAPHS) for a in node.attribute):
            return  # bodies need the whole-graph inference
        try:
            domain = "" if node.domain == "ai.onnx" else node.domain
            schema = onnx.defs.get_schema(node.op_type, self.opsets.get(domain, 1), domain)
            data = {n: numpy_helper.from_array(self.values[n], n) for n in node.input
                    if n in self.values}
            inferred = onnx.shape_inference.infer_node_outputs(
                schema, node, {n: self.types[n] for n in node.input if n},
                data, opset_imports=self.opset_imports, ir_version=self.ir_version)
        except Exception:  # noqa: BLE001  (no schema, a missing type, an inference error)
            return
        for name, value_type in inferred.items():
            if _type_is_sized(value_type, self.declared):
                self.types[name] = value_type
                self.improved.add(name)


def propagate_values(model: onnx.ModelProto, declared: frozenset[str] = frozenset(),
                     path: str = "") -> dict[str, Value]:
    """Values of the main graph's node outputs computable from shapes and small constants.

    Stored constants are not in the result (onnx shape inference reads those
    itself); Constant node outputs are. ``declared``: the symbolic dims the file
    declares (a tensor with only those is sized).
    """
    walk = _Walk(model, declared)
    graph = model.graph
    for index in topological_order(graph, lambda _name: True, path):
        walk.node(graph.node[index])
    return {name: value for name, value in walk.values.items() if name not in walk.stored}


# ------------------------------------------------------------------ feeding values back to inference

def _helps(graph: onnx.GraphProto, new_values: set[str], unsized: set[str]) -> bool:
    """Whether a newly known value feeds a node that leaves an output unsized."""
    return any(any(name in new_values for name in node.input) and
               any(name in unsized for name in node.output) for node in graph.node)


def _forget_unsized(graph: onnx.GraphProto, declared: frozenset[str]) -> None:
    """Drop inferred value_info that is not fully sized, and invented dim names on outputs,
    so the next inference starts from what is known rather than from stale placeholders."""
    kept = [v for v in graph.value_info if _type_is_sized(v.type, declared)]
    del graph.value_info[:]
    graph.value_info.extend(kept)
    for value in graph.output:
        for dim in value.type.tensor_type.shape.dim:
            if not _dim_is_sized(dim, declared):
                dim.Clear()


def _substitute(graph: onnx.GraphProto, values: Mapping[str, Value]) -> dict[str, str]:
    """Point every main-graph read of a known value at a new constant; {constant: original}."""
    taken = {t.name for t in graph.initializer} | {v.name for v in graph.input} | \
        {name for node in graph.node for name in node.output}
    constant_of: dict[str, str] = {}
    for node in graph.node:
        for position, name in enumerate(node.input):
            if name not in values:
                continue
            if name not in constant_of:
                constant = f"{name}::roofgate_value"
                while constant in taken:
                    constant += "_"
                taken.add(constant)
                constant_of[name] = constant
                graph.initializer.append(numpy_helper.from_array(values[name], constant))
            node.input[position] = constant_of[name]
    return {constant: name for name, constant in constant_of.items()}


def _restore(graph: onnx.GraphProto, originals: Mapping[str, str]) -> None:
    """Undo ``_substitute`` on an inferred copy: original input names, no added constants."""
    for node in graph.node:
        for position, name in enumerate(node.input):
            if name in originals:
                node.input[position] = originals[name]
    for field in (graph.initializer, graph.value_info, graph.input):
        kept = [item for item in field if item.name not in originals]
        if len(kept) != len(field):
            del field[:]
            field.extend(kept)


def _infer_with_values(model: onnx.ModelProto, values: Mapping[str, Value],
                       declared: frozenset[str],
                       infer: Callable[[onnx.ModelProto], onnx.ModelProto]) -> onnx.ModelProto | None:
    scratch = onnx.ModelProto()
    scratch.CopyFrom(model)
    _forget_unsized(scratch.graph, declared)
    originals = _substitute(scratch.graph, values)
    if huge_shape_data(scratch) is not None:
        return None  # the values would make inference hold a huge vector: keep what is known
    if scratch.ir_version < 4:  # older IR: every initializer must also be a graph input
        scratch.graph.input.extend(helper.make_tensor_value_info(
            c, helper.np_dtype_to_tensor_dtype(values[o].dtype), values[o].shape)
            for c, o in originals.items())
    try:
        inferred = infer(scratch)
    except Exception:  # noqa: BLE001  (inference failing here keeps the shapes already known)
        return None
    _restore(inferred.graph, originals)
    return inferred


def refine_shapes(model: onnx.ModelProto, declared: frozenset[str],
                  infer: Callable[[onnx.ModelProto], onnx.ModelProto],
                  path: str = "") -> onnx.ModelProto:
    """``model`` (inferred once) with shapes re-inferred from evaluated shape values.

    Runs only while some main-graph tensor is unsized; each round evaluates the
    shape arithmetic on the shapes known so far, infers again with those values
    as constants, and is kept only when it sizes more tensors (so the result is
    never worse than the input). ``declared``: symbolic dims the file declares
    (they count as sized: ``--dim`` binds them, values cannot).
    """
    handed_over: set[str] = set()
    unsized = unsized_names(model.graph, declared)
    for _ in range(MAX_ROUNDS):
        if not unsized:
            break
        values = propagate_values(model, declared, path)
        if not _helps(model.graph, values.keys() - handed_over, unsized):
            break  # nothing new reaches an unsized tensor: another inference would not help
        handed_over |= values.keys()
        candidate = _infer_with_values(model, values, declared, infer)
        if candidate is None:
            break
        remaining = unsized_names(candidate.graph, declared)
        if len(remaining) >= len(unsized):
            break
        model, unsized = candidate, remaining
    return model
