"""Shared helpers for the op cost functions: static shapes, broadcasting, work totals.

Every helper that needs a number it cannot know raises ``Unmodelled`` with a
reason a user can act on (which tensor, which symbolic dim, how to bind it),
so no cost function ever turns "unknown" into zero.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import replace
from math import prod

from gate.model.convert import UNKNOWN_DIM
from gate.model.graph import Node, TensorInfo
from gate.ops.registry import GemmShape, OpWork, Unmodelled

StaticShape = tuple[int, ...]


def static_shape(tensor: TensorInfo | None, role: str) -> StaticShape:
    """The tensor's shape as ints, or ``Unmodelled`` naming what is missing."""
    if tensor is None:
        raise Unmodelled(f"{role} input is missing")
    if tensor.is_static and tensor.shape.__class__ is tuple:  # the common case
        return tensor.shape  # type: ignore[return-value]
    if tensor.shape is None:
        raise Unmodelled(f"shape of {role} '{tensor.name}' is unknown (shape inference found no rank)")
    symbolic = tensor.symbolic_dims()
    if UNKNOWN_DIM in symbolic:
        raise Unmodelled(f"{role} '{tensor.name}' has a dim shape inference left unknown")
    if symbolic:
        dim = symbolic[0]
        raise Unmodelled(
            f"{role} '{tensor.name}' has symbolic dim '{dim}': bind it with --dim {dim}=N")
    return tuple(int(d) for d in tensor.shape)  # type: ignore[arg-type]


def input_shape(node: Node, position: int, role: str | None = None) -> StaticShape:
    """Static shape of input ``position``."""
    return static_shape(node.input(position), role or f"input {position}")


def output_shape(node: Node, position: int = 0) -> StaticShape:
    """Static shape of output ``position``."""
    tensor = node.outputs[position] if position < len(node.outputs) else None
    return static_shape(tensor, f"output {position}")


def inferred_output_shape(node: Node, position: int = 0) -> StaticShape | None:
    """The output shape if shape inference gave a fully static one, else None."""
    if position >= len(node.outputs):
        return None
    tensor = node.outputs[position]
    return tuple(tensor.shape) if tensor.is_static else None  # type: ignore[arg-type]


def numel(shape: Sequence[int]) -> int:
    return int(prod(shape))


def broadcast(shapes: Iterable[Sequence[int]]) -> StaticShape:
    """Numpy-style multidirectional broadcast of static shapes (ONNX broadcasting rules)."""
    result: list[int] = []
    for shape in shapes:
        shape = list(shape)
        width = max(len(result), len(shape))
        left = [1] * (width - len(result)) + result
        right = [1] * (width - len(shape)) + shape
        result = []
        for a, b in zip(left, right):
            if a != b and 1 not in (a, b):
                raise Unmodelled(f"shapes do not broadcast: dims {a} and {b}")
            result.append(b if a == 1 else a)
    return tuple(result)


def elementwise_output_elements(node: Node) -> int:
    """Output elements of a broadcasting op: inferred output, else broadcast of the inputs."""
    inferred = inferred_output_shape(node)
    if inferred is not None:
        return numel(inferred)
    shapes = [static_shape(t, f"input {i}") for i, t in enumerate(node.inputs) if t is not None]
    if not shapes:
        raise Unmodelled("no input shapes to broadcast")
    return numel(broadcast(shapes))


def arithmetic(ops: int, macs: int = 0, gemms: tuple[GemmShape, ...] = (), note: str = "") -> OpWork:
    """Work of an arithmetic op: ``ops`` non-MAC operations on the vector path plus MACs.

    Keeps the package invariant ``flops == 2 * macs + vector_ops``.
    """
    return OpWork(macs=macs, flops=2 * macs + ops, gemms=gemms, vector_ops=ops, note=note)


def movement(elements: int, note: str = "") -> OpWork:
    """Work of a data-movement op: elements written, no arithmetic (flops 0)."""
    return OpWork(vector_ops=elements, note=note)


def view(note: str = "") -> OpWork:
    """A metadata-only op: no data moves on a real runtime."""
    return OpWork(is_view=True, note=note)


def add_work(parts: Iterable[OpWork]) -> OpWork:
    """Sum of several works (gemms concatenated, notes joined)."""
    macs = flops = vector_ops = 0
    gemms: list[GemmShape] = []
    notes: list[str] = []
    for part in parts:
        macs += part.macs
        flops += part.flops
        vector_ops += part.vector_ops
        gemms.extend(part.gemms)
        if part.note:
            notes.append(part.note)
    return OpWork(macs=macs, flops=flops, gemms=tuple(gemms), vector_ops=vector_ops,
                  note="; ".join(dict.fromkeys(notes)))


def gemm_output_elements(work: OpWork) -> int:
    """Elements the work's GEMMs write (M x N per GEMM): where an epilogue applies."""
    return sum(g.m * g.n * g.count for g in work.gemms)


def repeat_work(work: OpWork, times: int, sequential: bool) -> OpWork:
    """``work`` done ``times`` times; ``sequential`` chains the repeats (loop-carried state)."""
    gemms = tuple(
        replace(g, count=g.count * times, sequential=g.sequential * times if sequential else g.sequential)
        for g in work.gemms)
    return OpWork(macs=work.macs * times, flops=work.flops * times, gemms=gemms,
                  vector_ops=work.vector_ops * times, is_view=work.is_view and times > 0,
                  note=work.note)


def int_attr_list(node: Node, name: str, length: int, default: int) -> list[int]:
    """A per-spatial-axis int list attribute, defaulted; wrong length is Unmodelled."""
    value = node.attr(name)
    if value is None:
        return [default] * length
    values = [int(v) for v in value]
    if len(values) != length:
        raise Unmodelled(f"attribute {name} has {len(values)} values, expected {length}")
    return values


def str_attr(node: Node, name: str, default: str) -> str:
    """A string attribute as ``str`` (tolerates bytes as stored in ONNX protos)."""
    value = node.attr(name, default)
    return value.decode() if isinstance(value, bytes) else str(value)
