"""Data-movement ops: no arithmetic, bandwidth only; views move nothing.

Views (Reshape, Squeeze, Unsqueeze, Flatten, Identity, inference Dropout) only
change metadata: ``is_view=True`` and zero work, whatever the shapes. Every
other data-movement op costs ``vector_ops`` = elements written to its outputs
(each is read once and written once; the byte traffic is counted by the
profiler from the tensor sizes) and ``flops`` = 0.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import (
    add_work,
    arithmetic,
    input_shape,
    movement,
    numel,
    output_shape,
    str_attr,
    view,
)
from gate.ops.registry import OpWork, register

VIEW_OPS = ("Reshape", "Squeeze", "Unsqueeze", "Flatten", "Identity")
MOVEMENT_OPS = (
    "Transpose", "Concat", "Split", "Slice", "Gather", "GatherElements", "GatherND",
    "Pad", "Expand", "Tile", "DepthToSpace", "SpaceToDepth", "ReverseSequence", "Trilu", "OneHot", "ConstantOfShape",
    "EyeLike", "CenterCropPad",
)


@register(*VIEW_OPS)
def view_op(node: Node) -> OpWork:
    return view()


@register("Dropout")
def dropout(node: Node) -> OpWork:
    """Inference Dropout is the identity; a training_mode input makes it real work."""
    if node.input(2) is not None:
        mode = node.const_values.get(2)
        if mode != (0,):
            return movement(numel(output_shape(node)), note="Dropout training_mode not known "
                                                            "to be off: counted as a copy")
    return view()


@register(*MOVEMENT_OPS)
def move(node: Node) -> OpWork:
    """Elements written across all outputs (Split writes every piece)."""
    written = [i for i, out in enumerate(node.outputs) if out.name]  # "" = omitted output
    return movement(sum(numel(output_shape(node, i)) for i in written))


@register("ScatterND", "ScatterElements")
def scatter(node: Node) -> OpWork:
    """A copy of ``data`` with updates written in; reduction="add"/"mul"/"max"/"min" adds
    one op per update element."""
    copy = move(node)
    if str_attr(node, "reduction", "none") == "none":
        return copy
    return add_work([copy, arithmetic(numel(input_shape(node, 2, "updates")))])
