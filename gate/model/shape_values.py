"""Shape values: small tensors computed from tensor shapes at run time, evaluated offline.

Exporters often compute a Reshape target, Pad amounts or a Range limit from
``Shape(x)`` through arithmetic that onnx shape inference's data propagation does
not follow (integer Div and Mod, ConstantOfShape, Range, a Cast through float,
Where ...), so every tensor downstream loses its size. ``refine_shapes`` evaluates
that arithmetic here on concrete values (numpy on arrays of at most
``VALUE_LIMIT`` elements), hands the results to onnx shape inference as
constants on a scratch copy, keeps the shapes it infers, and repeats while that
sizes more tensors. The graph itself is unchanged: the nodes that compute the
values are still layers, only their consumers' shapes become known.

What is read: tensor shapes, integer constants of at most 64 elements stored
inline and floating constants of at most 8 elements (an ``initializer`` or
``Constant`` node: Resize scales such as ``[1, 1]``, a divisor). Nothing larger,
so no weight payload is ever read. Only the main graph's nodes are evaluated;
subgraphs keep what onnx infers for them.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import AttributeProto, TensorProto, helper, numpy_helper

from gate.model.order import topological_order

VALUE_LIMIT = 1024  # elements of a computed value kept (shape vectors are far smaller)
READ_LIMIT = 64  # elements of a stored integer constant read (as gate.model.convert does)
FLOAT_READ_LIMIT = 8  # elements of a stored floating constant read (scales, not weights)
MAX_ROUNDS = 8  # rounds of evaluate-then-infer; each round must size something new

Value = np.ndarray
_INT_KINDS = "iub"  # signed, unsigned, bool: exact values
_NUMERIC_TYPES = frozenset({
    TensorProto.INT8, TensorProto.INT16, TensorProto.INT32, TensorProto.INT64,
    TensorProto.UINT8, TensorProto.UINT16, TensorProto.UINT32, TensorProto.UINT64,
    TensorProto.BOOL, TensorProto.FLOAT16, TensorProto.FLOAT, TensorProto.DOUBLE,
})


@dataclass(frozen=True, slots=True)
class _Args:
    """What a rule sees of one node: input values and shapes (None when unknown), attributes."""

    values: tuple[Value | None, ...]
    shapes: tuple[tuple[int, ...] | None, ...]
    attrs: Mapping[str, Any]

    def value(self, position: int) -> Value | None:
        return self.values[position] if position < len(self.values) else None

    def int_list(self, position: int, attr: str) -> list[int] | None:
        """Integer list from input ``position`` (newer opsets) or attribute ``attr`` (older)."""
        if attr in self.attrs:
            return [int(v) for v in self.attrs[attr]]
        value = self.value(position)
        return None if value is None else [int(v) for v in value.reshape(-1).tolist()]


Rule = Callable[[_Args], Value | None]


# ------------------------------------------------------------------ reading constants

def stored_value(tensor: TensorProto) -> Value | None:
    """A stored tensor's value when it is a small integer or floating constant, else None."""
    if tensor.data_location == TensorProto.EXTERNAL or tensor.data_type not in _NUMERIC_TYPES:
        return None
    count = 1
    for dim in tensor.dims:
        count *= int(dim)
    is_float = tensor.data_type in (TensorProto.FLOAT16, TensorProto.FLOAT, TensorProto.DOUBLE)
    if count < 0 or count > (FLOAT_READ_LIMIT if is_float else READ_LIMIT):
        return None
    try:
        return np.array(numpy_helper.to_array(tensor))
    except Exception:  # noqa: BLE001  (malformed inline data: simply not known statically)
        return None


def _constant_node_value(node: onnx.NodeProto) -> Value | None:
    for attribute in node.attribute:
        if attribute.name == "value" and attribute.type == AttributeProto.TENSOR:
            return stored_value(attribute.t)
        if attribute.name == "value_int":
            return np.array(attribute.i, np.int64)
        if attribute.name == "value_ints" and len(attribute.ints) <= READ_LIMIT:
            return np.array(list(attribute.ints), np.int64)
        if attribute.name == "value_float":
            return np.array(attribute.f, np.float32)
        if attribute.name == "value_floats" and len(attribute.floats) <= FLOAT_READ_LIMIT:
            return np.array(list(attribute.floats), np.float32)
    return None


# ------------------------------------------------------------------ exact integer arithmetic

def _fit(result: Any, like: np.dtype) -> Value | None:
    """An object (Python int) result back in ``like``'s dtype, or None when it overflows."""
    array = np.asarray(result, dtype=object)
    if like.kind == "b":
        return array.astype(bool)
    info = np.iinfo(like)
    if any(not info.min <= int(v) <= info.max for v in array.reshape(-1).tolist()):
        return None
    return array.astype(like)


def _trunc_div(a: int, b: int) -> int:
    """Integer division rounding toward zero (the ONNX Div rule for integer tensors)."""
    quotient = abs(a) // abs(b)
    return quotient if (a < 0) == (b < 0) else -quotient


def _binary(int_op: Callable[[Any, Any], Any], float_op: Callable[[Any, Any], Any]) -> Rule:
    """A broadcasting two-input rule: exact Python-int arithmetic for integers."""
    def rule(args: _Args) -> Value | None:
        a, b = args.value(0), args.value(1)
        if a is None or b is None or a.dtype != b.dtype:
            return None
        if a.dtype.kind in _INT_KINDS:
            return _fit(int_op(a.astype(object), b.astype(object)), a.dtype)
        with np.errstate(all="raise"):
            return np.asarray(float_op(a, b)).astype(a.dtype)
    return rule


def _vectorised(func: Callable[[int, int], int]) -> Callable[[Any, Any], Any]:
    return np.vectorize(func, otypes=[object])  # type: ignore[no-any-return]


def _fmod(a: int, b: int) -> int:
    """The remainder with the sign of the dividend (C's fmod); ``b == 0`` raises."""
    remainder = abs(a) % abs(b)
    return remainder if a >= 0 else -remainder


def _mod(args: _Args) -> Value | None:
    """Mod: Python's sign-of-divisor remainder, or C's fmod when ``fmod=1`` (ONNX spec)."""
    if args.attrs.get("fmod", 0):
        return _binary(_vectorised(_fmod), np.fmod)(args)
    return _binary(operator.mod, np.mod)(args)


def _variadic(op: Callable[[Any, Any], Any]) -> Rule:
    """Max, Min, Sum: fold ``op`` over every input."""
    def rule(args: _Args) -> Value | None:
        if not args.values or any(v is None for v in args.values):
            return None
        result = args.values[0]
        for value in args.values[1:]:
            result = _binary(op, op)(_Args((result, value), (), {}))
            if result is None:
                return None
        return result
    return rule


def _unary(func: Callable[[Value], Value], floats_only: bool = False) -> Rule:
    def rule(args: _Args) -> Value | None:
        value = args.value(0)
        if value is None or (floats_only and value.dtype.kind != "f"):
            return None
        if value.dtype.kind in _INT_KINDS:
            return _fit(func(value.astype(object)), value.dtype)
        with np.errstate(all="raise"):
            return np.asarray(func(value)).astype(value.dtype)
    return rule


# ------------------------------------------------------------------ shape and movement rules

def _shape(args: _Args) -> Value | None:
    shape = args.shapes[0] if args.shapes else None
    if shape is None:
        return None
    start, end = int(args.attrs.get("start", 0)), args.attrs.get("end")
    return np.array(shape[start:None if end is None else int(end)], np.int64)


def _size(args: _Args) -> Value | None:
    shape = args.shapes[0] if args.shapes else None
    return None if shape is None else np.array(int(np.prod(shape, dtype=object)), np.int64)


def _gather(args: _Args) -> Value | None:
    data, indices = args.value(0), args.value(1)
    if data is None or indices is None or indices.dtype.kind not in "iu":
        return None
    return np.take(data, indices, axis=int(args.attrs.get("axis", 0)))


def _slice(args: _Args) -> Value | None:
    data = args.value(0)
    starts, ends = args.int_list(1, "starts"), args.int_list(2, "ends")
    if data is None or starts is None or ends is None or len(starts) != len(ends):
        return None
    axes = args.int_list(3, "axes") or list(range(len(starts)))
    steps = ([1] * len(starts)) if "starts" in args.attrs else (args.int_list(4, "") or
                                                                 [1] * len(starts))
    if len(axes) != len(starts) or len(steps) != len(starts) or 0 in steps:
        return None
    index: list[slice] = [slice(None)] * data.ndim
    for axis, start, end, step in zip(axes, starts, ends, steps):
        index[axis] = slice(start, end, step)  # Python clamps out-of-range bounds as ONNX does
    return data[tuple(index)]


def _concat(args: _Args) -> Value | None:
    if not args.values or any(v is None for v in args.values):
        return None
    return np.concatenate(args.values, axis=int(args.attrs.get("axis", 0)))  # type: ignore[arg-type]


def _unsqueeze(args: _Args) -> Value | None:
    data, axes = args.value(0), args.int_list(1, "axes")
    if data is None or axes is None:
        return None
    return np.expand_dims(data, tuple(axes))


def _squeeze(args: _Args) -> Value | None:
    data, axes = args.value(0), args.int_list(1, "axes")
    if data is None:
        return None
    return np.squeeze(data, axis=None if not axes else tuple(axes))


def _cast(args: _Args) -> Value | None:
    data, to = args.value(0), int(args.attrs.get("to", 0))
    if data is None or to not in _NUMERIC_TYPES:
        return None
    target = np.dtype(helper.tensor_dtype_to_np_dtype(to))
    if data.dtype.kind == "f" and target.kind in "iu":
        if not np.all(np.isfinite(data)):
            return None
        return _fit(np.trunc(data).astype(object), target)
    if target.kind in "iu":
        return _fit(data.astype(object), target)
    with np.errstate(all="raise"):  # e.g. a float32 beyond float16's range
        return data.astype(target)


def _constant_of_shape(args: _Args) -> Value | None:
    shape = args.int_list(0, "")
    if shape is None or any(d < 0 for d in shape) or int(np.prod(shape)) > VALUE_LIMIT:
        return None
    fill = args.attrs.get("value")
    fill_value = np.zeros(1, np.float32) if fill is None else stored_value(fill)
    if fill_value is None or fill_value.size != 1:
        return None
    return np.full(shape, fill_value.reshape(-1)[0], fill_value.dtype)


def _range(args: _Args) -> Value | None:
    start, limit, delta = args.value(0), args.value(1), args.value(2)
    if start is None or limit is None or delta is None or not delta.item():
        return None
    count = int(np.ceil((float(limit.item()) - float(start.item())) / float(delta.item())))
    if count > VALUE_LIMIT:
        return None
    return start.item() + np.arange(max(count, 0), dtype=object) * delta.item()


def _range_rule(args: _Args) -> Value | None:
    start = args.value(0)
    result = _range(args)
    if result is None or start is None:
        return None
    return _fit(result, start.dtype) if start.dtype.kind in _INT_KINDS else \
        np.asarray(result, dtype=start.dtype)


def _reshape(args: _Args) -> Value | None:
    data, shape = args.value(0), args.int_list(1, "shape")
    if data is None or shape is None:
        return None
    if not args.attrs.get("allowzero", 0):
        shape = [data.shape[i] if d == 0 and i < data.ndim else d for i, d in enumerate(shape)]
    return data.reshape(shape)


def _expand(args: _Args) -> Value | None:
    data, shape = args.value(0), args.int_list(1, "")
    if data is None or shape is None:
        return None
    target = np.broadcast_shapes(data.shape, tuple(shape))
    if int(np.prod(target)) > VALUE_LIMIT:
        return None
    return np.broadcast_to(data, target).copy()


def _where(args: _Args) -> Value | None:
    cond, x, y = args.value(0), args.value(1), args.value(2)
    if cond is None or x is None or y is None or x.dtype != y.dtype:
        return None
    return np.where(cond.astype(bool), x, y)


def _compare(op: Callable[[Any, Any], Any]) -> Rule:
    def rule(args: _Args) -> Value | None:
        a, b = args.value(0), args.value(1)
        if a is None or b is None:
            return None
        return np.asarray(op(a, b), dtype=bool)
    return rule


def _reduce(op: Callable[..., Any]) -> Rule:
    """ReduceSum/Prod/Min/Max, axes as attribute (older opsets) or input 1 (newer)."""
    def rule(args: _Args) -> Value | None:
        data = args.value(0)
        if data is None:
            return None
        axes = args.int_list(1, "axes")
        if not axes and args.attrs.get("noop_with_empty_axes", 0):
            return data
        keep = bool(args.attrs.get("keepdims", 1))
        result = op(data.astype(object) if data.dtype.kind in "iu" else data,
                    axis=tuple(axes) if axes else None, keepdims=keep)
        return _fit(result, data.dtype) if data.dtype.kind in "iu" else np.asarray(result)
    return rule


RULES: Mapping[str, Rule] = {
    "Shape": _shape, "Size": _size, "Gather": _gather, "Slice": _slice, "Concat": _concat,
    "Unsqueeze": _unsqueeze, "Squeeze": _squeeze, "Cast": _cast, "Identity": lambda a: a.value(0),
    "ConstantOfShape": _constant_of_shape, "Range": _range_rule, "Reshape": _reshape,
    "Expand": _expand, "Where": _where,
    "Add": _binary(operator.add, np.add), "Sub": _binary(operator.sub, np.subtract),
    "Mul": _binary(operator.mul, np.multiply),
    "Div": _binary(_vectorised(_trunc_div), np.divide), "Mod": _mod,
    "Max": _variadic(np.maximum), "Min": _variadic(np.minimum),
    "Neg": _unary(operator.neg), "Abs": _unary(np.abs),
    "Floor": _unary(np.floor, floats_only=True), "Ceil": _unary(np.ceil, floats_only=True),
    "Round": _unary(np.round, floats_only=True),
    "Equal": _compare(operator.eq), "Less": _compare(operator.lt),
    "Greater": _compare(operator.gt), "LessOrEqual": _compare(operator.le),
    "GreaterOrEqual": _compare(operator.ge), "Not": lambda a: _logical(np.logical_not, a),
    "And": lambda a: _logical(np.logical_and, a), "Or": lambda a: _logical(np.logical_or, a),
    "ReduceSum": _reduce(np.sum), "ReduceProd": _reduce(np.prod),
    "ReduceMin": _reduce(np.min), "ReduceMax": _reduce(np.max),
}


def _logical(func: Callable[..., Any], args: _Args) -> Value | None:
    if not args.values or any(v is None or v.dtype.kind != "b" for v in args.values):
        return None
    return np.asarray(func(*args.values), dtype=bool)


# ------------------------------------------------------------------ evaluating a graph

def _static_shapes(graph: onnx.GraphProto) -> dict[str, tuple[int, ...]]:
    """Every tensor of ``graph`` whose declared or inferred shape is fully known."""
    shapes: dict[str, tuple[int, ...]] = {t.name: tuple(int(d) for d in t.dims)
                                          for t in graph.initializer}
    for value in (*graph.input, *graph.value_info, *graph.output):
        tensor = value.type.tensor_type
        if not value.type.HasField("tensor_type") or not tensor.HasField("shape"):
            continue
        dims = tensor.shape.dim
        if all(d.HasField("dim_value") and d.dim_value >= 0 for d in dims):
            shapes.setdefault(value.name, tuple(int(d.dim_value) for d in dims))
    return shapes


def _stored_values(graph: onnx.GraphProto) -> dict[str, Value]:
    values = {}
    for tensor in graph.initializer:
        value = stored_value(tensor)
        if value is not None:
            values[tensor.name] = value
    return values


def _plain_attributes(node: onnx.NodeProto) -> dict[str, Any]:
    return {a.name: helper.get_attribute_value(a) for a in node.attribute
            if a.type not in (AttributeProto.GRAPH, AttributeProto.GRAPHS)}


def _evaluate(node: onnx.NodeProto, values: Mapping[str, Value],
              shapes: Mapping[str, tuple[int, ...]]) -> Value | None:
    """The value of the node's first output, or None when a rule cannot give it."""
    if node.op_type == "Constant":
        return _constant_node_value(node)
    rule = RULES.get(node.op_type)
    if rule is None or node.domain not in ("", "ai.onnx"):
        return None
    args = _Args(tuple(values.get(n) if n else None for n in node.input),
                 tuple(shapes.get(n) if n else None for n in node.input),
                 _plain_attributes(node))
    try:
        result = rule(args)
    except (ValueError, TypeError, IndexError, ArithmeticError, FloatingPointError):
        return None  # inconsistent or unsupported inputs: simply not known statically
    if result is None or result.size > VALUE_LIMIT or result.dtype.kind not in "iubf":
        return None
    return result


def propagate_values(graph: onnx.GraphProto, path: str = "") -> dict[str, Value]:
    """Values of the main graph's node outputs computable from shapes and small constants.

    Stored constants are not in the result (onnx shape inference reads those
    itself); Constant node outputs are.
    """
    shapes = _static_shapes(graph)
    values = _stored_values(graph)
    stored = set(values)
    for index in topological_order(graph, lambda _name: True, path):
        node = graph.node[index]
        if len(node.output) != 1 or not node.output[0]:
            continue
        result = _evaluate(node, values, shapes)
        if result is not None:
            values[node.output[0]] = result
            shapes.setdefault(node.output[0], tuple(result.shape))
    return {name: value for name, value in values.items() if name not in stored}


# ------------------------------------------------------------------ feeding values back to inference

def _dim_is_sized(dim: onnx.TensorShapeProto.Dimension, declared: frozenset[str]) -> bool:
    if dim.HasField("dim_value"):
        return dim.dim_value >= 0
    return dim.HasField("dim_param") and dim.dim_param in declared


def _value_is_sized(value: onnx.ValueInfoProto, declared: frozenset[str]) -> bool:
    """Sized: a tensor whose every dim is a value or a symbolic dim the file declares.

    Non-tensor values (sequences, maps, optionals) count as sized: values cannot help them.
    """
    if not value.type.HasField("tensor_type"):
        return True
    tensor = value.type.tensor_type
    return tensor.HasField("shape") and all(_dim_is_sized(d, declared) for d in tensor.shape.dim)


def unsized_names(graph: onnx.GraphProto, declared: frozenset[str]) -> set[str]:
    """Node outputs of the main graph without a known rank or with a dim nobody can name."""
    sized = {v.name: _value_is_sized(v, declared) for v in (*graph.value_info, *graph.output)}
    return {name for node in graph.node for name in node.output
            if name and not sized.get(name, False)}


def _helps(graph: onnx.GraphProto, new_values: set[str], unsized: set[str]) -> bool:
    """Whether a newly known value feeds a node that leaves an output unsized."""
    return any(any(name in new_values for name in node.input) and
               any(name in unsized for name in node.output) for node in graph.node)


def _forget_unsized(graph: onnx.GraphProto, declared: frozenset[str]) -> None:
    """Drop inferred value_info that is not fully sized, and invented dim names on outputs,
    so the next inference starts from what is known rather than from stale placeholders."""
    kept = [v for v in graph.value_info if _value_is_sized(v, declared)]
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
        values = propagate_values(model.graph, path)
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
