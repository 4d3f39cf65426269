"""Resize (and the deprecated Upsample): interpolation work per output element.

Only the axes whose size changes are interpolated. Interpolation is separable:
an n-linear sample is 2^d - 1 one-dimensional lerps of 3 ops (sub, mul, add);
an n-cubic sample is (4^d - 1) / 3 four-tap interpolations of 7 ops (4 mul,
3 add), with the tap weights precomputed per axis (common practice, no
source). Nearest neighbour is pure data movement. Antialiased resizing
(kernel width depends on the scale) is Unmodelled.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, input_shape, movement, numel, output_shape, str_attr
from gate.ops.registry import OpWork, Unmodelled, register

_LERP_OPS = 3
_CUBIC_TAP_OPS = 7
_MODES = {"nearest": "nearest", "linear": "linear", "bilinear": "linear", "cubic": "cubic"}


def interpolation_ops(mode: str, interpolated_axes: int) -> int:
    """Operations per output element for ``mode`` over ``interpolated_axes`` axes."""
    if mode == "nearest" or interpolated_axes == 0:
        return 0
    if mode == "linear":
        return _LERP_OPS * (2 ** interpolated_axes - 1)
    return _CUBIC_TAP_OPS * (4 ** interpolated_axes - 1) // 3


@register("Resize", "Upsample")
def resize(node: Node) -> OpWork:
    raw_mode = str_attr(node, "mode", "nearest")
    mode = _MODES.get(raw_mode)
    if mode is None:
        raise Unmodelled(f"{node.op_type} mode={raw_mode!r} is not modelled")
    if node.attr("antialias", 0):
        raise Unmodelled("Resize antialias=1 is not modelled (its filter width depends on the scale)")
    x = input_shape(node, 0, "X")
    y = output_shape(node)
    if len(x) != len(y):
        raise Unmodelled(f"Resize input {x} and output {y} differ in rank")
    axes = sum(1 for a, b in zip(x, y) if a != b)
    per_output = interpolation_ops(mode, axes)
    if per_output == 0:
        return movement(numel(y))
    return arithmetic(per_output * numel(y))
