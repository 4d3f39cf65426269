"""Shape arithmetic on concrete values: one numpy rule per ONNX op exporters use on shapes.

Each rule takes a node's known input values and shapes (``RuleArgs``) and returns
its output value, or None when it cannot give it exactly. Integer arithmetic
runs on Python ints (``_fit`` puts the result back in the tensor's dtype), so an
overflow, a division by zero or an index out of range gives None (unknown),
never a wrapped-around number. ``tests/test_shapes.py`` checks every rule
against ``onnx.reference`` running the same node.

What is read of a stored tensor (``stored_value``): integer constants of at most
64 elements and floating constants of at most 8 (Resize scales such as
``[1, 1]``, a divisor). Nothing larger, so no weight payload is ever read.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import AttributeProto, TensorProto, helper, numpy_helper

VALUE_LIMIT = 1024  # elements of a computed value kept (shape vectors are far smaller)
READ_LIMIT = 64  # elements of a stored integer constant read (as gate.model.convert does)
FLOAT_READ_LIMIT = 8  # elements of a stored floating constant read (scales, not weights)

Value = np.ndarray
_INT_KINDS = "iub"  # signed, unsigned, bool: exact values
_NUMERIC_TYPES = frozenset({
    TensorProto.INT8, TensorProto.INT16, TensorProto.INT32, TensorProto.INT64,
    TensorProto.UINT8, TensorProto.UINT16, TensorProto.UINT32, TensorProto.UINT64,
    TensorProto.BOOL, TensorProto.FLOAT16, TensorProto.FLOAT, TensorProto.DOUBLE,
})


@dataclass(frozen=True, slots=True)
class RuleArgs:
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


Rule = Callable[[RuleArgs], Value | None]


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


def constant_node_value(node: onnx.NodeProto) -> Value | None:
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
    def rule(args: RuleArgs) -> Value | None:
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


def _mod(args: RuleArgs) -> Value | None:
    """Mod: Python's sign-of-divisor remainder, or C's fmod when ``fmod=1`` (ONNX spec)."""
    if args.attrs.get("fmod", 0):
        return _binary(_vectorised(_fmod), np.fmod)(args)
    return _binary(operator.mod, np.mod)(args)


def _variadic(op: Callable[[Any, Any], Any]) -> Rule:
    """Max, Min, Sum: fold ``op`` over every input."""
    def rule(args: RuleArgs) -> Value | None:
        if not args.values or any(v is None for v in args.values):
            return None
        result = args.values[0]
        for value in args.values[1:]:
            result = _binary(op, op)(RuleArgs((result, value), (), {}))
            if result is None:
                return None
        return result
    return rule


def _unary(func: Callable[[Value], Value], floats_only: bool = False) -> Rule:
    def rule(args: RuleArgs) -> Value | None:
        value = args.value(0)
        if value is None or (floats_only and value.dtype.kind != "f"):
            return None
        if value.dtype.kind in _INT_KINDS:
            return _fit(func(value.astype(object)), value.dtype)
        with np.errstate(all="raise"):
            return np.asarray(func(value)).astype(value.dtype)
    return rule


# ------------------------------------------------------------------ shape and movement rules

def _shape(args: RuleArgs) -> Value | None:
    shape = args.shapes[0] if args.shapes else None
    if shape is None:
        return None
    start, end = int(args.attrs.get("start", 0)), args.attrs.get("end")
    return np.array(shape[start:None if end is None else int(end)], np.int64)


def _size(args: RuleArgs) -> Value | None:
    shape = args.shapes[0] if args.shapes else None
    return None if shape is None else np.array(int(np.prod(shape, dtype=object)), np.int64)


def _gather(args: RuleArgs) -> Value | None:
    data, indices = args.value(0), args.value(1)
    if data is None or indices is None or indices.dtype.kind not in "iu":
        return None
    return np.take(data, indices, axis=int(args.attrs.get("axis", 0)))


def _slice(args: RuleArgs) -> Value | None:
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


def _concat(args: RuleArgs) -> Value | None:
    if not args.values or any(v is None for v in args.values):
        return None
    return np.concatenate(args.values, axis=int(args.attrs.get("axis", 0)))  # type: ignore[arg-type]


def _unsqueeze(args: RuleArgs) -> Value | None:
    data, axes = args.value(0), args.int_list(1, "axes")
    if data is None or axes is None:
        return None
    return np.expand_dims(data, tuple(axes))


def _squeeze(args: RuleArgs) -> Value | None:
    data, axes = args.value(0), args.int_list(1, "axes")
    if data is None:
        return None
    return np.squeeze(data, axis=None if not axes else tuple(axes))


def _cast(args: RuleArgs) -> Value | None:
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


def _constant_of_shape(args: RuleArgs) -> Value | None:
    shape = args.int_list(0, "")
    if shape is None or any(d < 0 for d in shape) or int(np.prod(shape)) > VALUE_LIMIT:
        return None
    fill = args.attrs.get("value")
    fill_value = np.zeros(1, np.float32) if fill is None else stored_value(fill)
    if fill_value is None or fill_value.size != 1:
        return None
    return np.full(shape, fill_value.reshape(-1)[0], fill_value.dtype)


def _range(args: RuleArgs) -> Value | None:
    start, limit, delta = args.value(0), args.value(1), args.value(2)
    if start is None or limit is None or delta is None or not delta.item():
        return None
    count = int(np.ceil((float(limit.item()) - float(start.item())) / float(delta.item())))
    if count > VALUE_LIMIT:
        return None
    return start.item() + np.arange(max(count, 0), dtype=object) * delta.item()


def _range_rule(args: RuleArgs) -> Value | None:
    start = args.value(0)
    result = _range(args)
    if result is None or start is None:
        return None
    return _fit(result, start.dtype) if start.dtype.kind in _INT_KINDS else \
        np.asarray(result, dtype=start.dtype)


def _reshape(args: RuleArgs) -> Value | None:
    data, shape = args.value(0), args.int_list(1, "shape")
    if data is None or shape is None:
        return None
    if not args.attrs.get("allowzero", 0):
        shape = [data.shape[i] if d == 0 and i < data.ndim else d for i, d in enumerate(shape)]
    return data.reshape(shape)


def _expand(args: RuleArgs) -> Value | None:
    data, shape = args.value(0), args.int_list(1, "")
    if data is None or shape is None:
        return None
    target = np.broadcast_shapes(data.shape, tuple(shape))
    if int(np.prod(target)) > VALUE_LIMIT:
        return None
    return np.broadcast_to(data, target).copy()


def _flatten(args: RuleArgs) -> Value | None:
    data = args.value(0)
    if data is None:
        return None
    axis = int(args.attrs.get("axis", 1))
    axis = axis + data.ndim if axis < 0 else axis
    return data.reshape(int(np.prod(data.shape[:axis])), -1) if data.size else None


def _tile(args: RuleArgs) -> Value | None:
    data, repeats = args.value(0), args.int_list(1, "")
    if data is None or repeats is None or len(repeats) != data.ndim or min(repeats, default=0) < 0:
        return None
    if data.size * int(np.prod(repeats)) > VALUE_LIMIT:
        return None
    return np.tile(data, repeats)


def _where(args: RuleArgs) -> Value | None:
    cond, x, y = args.value(0), args.value(1), args.value(2)
    if cond is None or x is None or y is None or x.dtype != y.dtype:
        return None
    return np.where(cond.astype(bool), x, y)


def _compare(op: Callable[[Any, Any], Any]) -> Rule:
    def rule(args: RuleArgs) -> Value | None:
        a, b = args.value(0), args.value(1)
        if a is None or b is None:
            return None
        return np.asarray(op(a, b), dtype=bool)
    return rule


def _reduce(op: Callable[..., Any]) -> Rule:
    """ReduceSum/Prod/Min/Max, axes as attribute (older opsets) or input 1 (newer)."""
    def rule(args: RuleArgs) -> Value | None:
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


SHAPE_READERS = frozenset({"Shape", "Size"})  # the rules that read shapes; all others read values
RULES: Mapping[str, Rule] = {
    "Shape": _shape, "Size": _size, "Gather": _gather, "Slice": _slice, "Concat": _concat,
    "Unsqueeze": _unsqueeze, "Squeeze": _squeeze, "Cast": _cast, "Identity": lambda a: a.value(0),
    "ConstantOfShape": _constant_of_shape, "Range": _range_rule, "Reshape": _reshape,
    "Expand": _expand, "Where": _where,
    "Add": _binary(operator.add, np.add), "Sub": _binary(operator.sub, np.subtract),
    "Mul": _binary(operator.mul, np.multiply),
    "Div": _binary(_vectorised(_trunc_div), np.divide), "Mod": _mod,
    "Max": _variadic(np.maximum), "Min": _variadic(np.minimum),
    "Neg": _unary(operator.neg), "Abs": _unary(np.abs), "Sign": _unary(np.sign),
    "Flatten": _flatten, "Tile": _tile, "Xor": lambda a: _logical(np.logical_xor, a),
    "Floor": _unary(np.floor, floats_only=True), "Ceil": _unary(np.ceil, floats_only=True),
    "Round": _unary(np.round, floats_only=True),
    "Equal": _compare(operator.eq), "Less": _compare(operator.lt),
    "Greater": _compare(operator.gt), "LessOrEqual": _compare(operator.le),
    "GreaterOrEqual": _compare(operator.ge), "Not": lambda a: _logical(np.logical_not, a),
    "And": lambda a: _logical(np.logical_and, a), "Or": lambda a: _logical(np.logical_or, a),
    "ReduceSum": _reduce(np.sum), "ReduceProd": _reduce(np.prod),
    "ReduceMin": _reduce(np.min), "ReduceMax": _reduce(np.max),
}


def _logical(func: Callable[..., Any], args: RuleArgs) -> Value | None:
    if not args.values or any(v is None or v.dtype.kind != "b" for v in args.values):
        return None
    return np.asarray(func(*args.values), dtype=bool)


# ------------------------------------------------------------------ one node

def _plain_attributes(node: onnx.NodeProto) -> dict[str, Any]:
    return {a.name: helper.get_attribute_value(a) for a in node.attribute
            if a.type not in (AttributeProto.GRAPH, AttributeProto.GRAPHS)}


def evaluate_node(node: onnx.NodeProto, values: Mapping[str, Value],
                  shape_of: Callable[[str], tuple[int, ...] | None]) -> Value | None:
    """The value of the node's first output from its inputs' known ``values`` (and, for
    Shape and Size, ``shape_of`` its input), or None when no rule gives it exactly."""
    if node.op_type == "Constant":
        return constant_node_value(node)
    rule = RULES.get(node.op_type)
    if rule is None or node.domain not in ("", "ai.onnx"):
        return None
    reads_shapes = node.op_type in SHAPE_READERS
    if not reads_shapes and not any(n in values for n in node.input):
        return None  # every other rule needs a known input value
    shapes = tuple(shape_of(n) if n else None for n in node.input) if reads_shapes else ()
    args = RuleArgs(tuple(values.get(n) if n else None for n in node.input), shapes,
                    _plain_attributes(node))
    try:
        result = rule(args)
    except (ValueError, TypeError, IndexError, ArithmeticError, FloatingPointError):
        return None  # inconsistent or unsupported inputs: simply not known statically
    if result is None or result.size > VALUE_LIMIT or result.dtype.kind not in "iubf":
        return None
    return result
