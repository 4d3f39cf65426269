"""Windowed and global pools: vector work, no MACs.

Per output element a window of k elements costs k operations (one compare for
max, one add for average; the padded positions are visited too), plus one
divide for average; LpPool costs |x|^p and an add per window element plus one
root (common practice, no source). Output sizes use the inferred output shape,
else the ONNX spec formula with ceil_mode.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, inferred_output_shape, input_shape, numel
from gate.ops._spatial import auto_pad, window_output_spatial
from gate.ops.registry import OpWork, Unmodelled, register

_FINISH_OPS = {"MaxPool": 0, "AveragePool": 1, "LpPool": 1}
_OPS_PER_WINDOW_ELEMENT = {"MaxPool": 1, "AveragePool": 1, "LpPool": 2}


def _kernel(node: Node, spatial_rank: int) -> tuple[int, ...]:
    kernel = node.attr("kernel_shape")
    if not kernel or len(kernel) != spatial_rank:
        raise Unmodelled(f"kernel_shape {kernel} does not match {spatial_rank} spatial dims")
    values = tuple(int(k) for k in kernel)
    if any(k < 1 for k in values):
        raise Unmodelled(f"kernel_shape {list(values)} must be positive")
    return values


def _pool_output_elements(node: Node, x: tuple[int, ...], kernel: tuple[int, ...]) -> int:
    auto_pad(node)  # checked even when inference supplied the shape
    inferred = inferred_output_shape(node)
    if inferred is not None and len(inferred) == len(x):
        return numel(inferred)
    spatial = window_output_spatial(node, x[2:], kernel, ceil_mode=bool(node.attr("ceil_mode", 0)))
    return x[0] * x[1] * numel(spatial)


@register("MaxPool", "AveragePool", "LpPool")
def windowed_pool(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    if len(x) < 3:
        raise Unmodelled(f"{node.op_type} needs rank >= 3, got {x}")
    kernel = _kernel(node, len(x) - 2)
    outputs = _pool_output_elements(node, x, kernel)
    per_output = _OPS_PER_WINDOW_ELEMENT[node.op_type] * numel(kernel) + _FINISH_OPS[node.op_type]
    return arithmetic(per_output * outputs)


@register("GlobalMaxPool", "GlobalAveragePool", "GlobalLpPool")
def global_pool(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    if len(x) < 3:
        raise Unmodelled(f"{node.op_type} needs rank >= 3, got {x}")
    kind = node.op_type.replace("Global", "")
    window = numel(x[2:])
    per_output = _OPS_PER_WINDOW_ELEMENT[kind] * window + _FINISH_OPS[kind]
    return arithmetic(per_output * x[0] * x[1])
