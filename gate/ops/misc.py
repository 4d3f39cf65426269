"""Constants, shape queries, casts and small generators.

Constant, Shape and Size need no runtime work on the data path (a constant is
stored in the model and folded at load time; a shape is metadata), so they are
views. Cast and CastLike convert every element: data movement with one vector
op per element and no FLOPs. Range writes one add per element; NonZero
compares every input element.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, input_shape, movement, numel, output_shape, view
from gate.ops.registry import OpWork, register


@register("Constant")
def constant(node: Node) -> OpWork:
    return view(note="constant folded at load time")


@register("Shape", "Size")
def shape_query(node: Node) -> OpWork:
    return view(note="shape metadata")


@register("Cast", "CastLike")
def cast(node: Node) -> OpWork:
    return movement(numel(input_shape(node, 0, "input")), note="type conversion")


@register("Range")
def range_op(node: Node) -> OpWork:
    return arithmetic(numel(output_shape(node)))


@register("NonZero")
def non_zero(node: Node) -> OpWork:
    return arithmetic(numel(input_shape(node, 0, "X")))
