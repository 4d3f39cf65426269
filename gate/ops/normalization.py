"""Normalisation and softmax-family ops: vector work per element and per normalised row.

Per-element and per-row operation counts follow each op's formula in the ONNX
operator spec, one operation per add/mul/compare/transcendental (common
practice, no source). A "row" is one group of elements sharing a mean/variance
(or a softmax denominator).
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, input_shape, numel
from gate.ops.registry import OpWork, Unmodelled, register

# Inference BatchNormalization folds to y = x * a + b per element (2 ops); a, b
# per channel: var + eps, sqrt, scale / sqrt, mean * a, bias - that (5 ops).
BATCHNORM_OPS_PER_ELEMENT, BATCHNORM_OPS_PER_CHANNEL = 2, 5
# Mean: add; centre: sub; square; variance: add; normalise: mul by 1/std;
# scale: mul; bias: add  -> 7 per element (6 without a bias).
# Per row: mean divide, variance divide, + eps, sqrt, reciprocal -> 5.
MOMENT_NORM_OPS_PER_ELEMENT, MOMENT_NORM_OPS_PER_ROW = 7, 5
# RMSNormalization: square, add, mul by 1/rms, scale mul; per row: divide, + eps, sqrt, reciprocal.
RMS_NORM_OPS_PER_ELEMENT, RMS_NORM_OPS_PER_ROW = 4, 4
# Softmax with the max subtraction every runtime applies: max, sub, exp, add, divide.
SOFTMAX_OPS_PER_ELEMENT = 5
# LogSoftmax: max, sub, exp, add, sub of log-sum; per row: one log.
LOG_SOFTMAX_OPS_PER_ELEMENT, LOG_SOFTMAX_OPS_PER_ROW = 5, 1
HARDMAX_OPS_PER_ELEMENT = 2  # compare for the arg-max, write of the one-hot value


def _axis(node: Node, rank: int, default: int) -> int:
    axis = int(node.attr("axis", default))
    if not -rank <= axis < rank:
        raise Unmodelled(f"axis={axis} is out of range for rank {rank}")
    return axis % rank


def _rows_from_axis(shape: tuple[int, ...], axis: int) -> int:
    """Rows when every dim from ``axis`` on is normalised together."""
    return numel(shape[:axis])


@register("BatchNormalization")
def batch_normalization(node: Node) -> OpWork:
    if node.attr("training_mode", 0):
        raise Unmodelled("BatchNormalization training_mode=1 (batch statistics) is not "
                         "modelled; export the model for inference")
    x = input_shape(node, 0, "X")
    channels = x[1] if len(x) > 1 else 1
    return arithmetic(BATCHNORM_OPS_PER_ELEMENT * numel(x) + BATCHNORM_OPS_PER_CHANNEL * channels)


def _moment_norm(elements: int, rows: int, has_bias: bool) -> OpWork:
    per_element = MOMENT_NORM_OPS_PER_ELEMENT - (0 if has_bias else 1)
    return arithmetic(per_element * elements + MOMENT_NORM_OPS_PER_ROW * rows)


@register("LayerNormalization")
def layer_normalization(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    rows = _rows_from_axis(x, _axis(node, len(x), -1))
    return _moment_norm(numel(x), rows, node.input(2) is not None)


@register("InstanceNormalization")
def instance_normalization(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    if len(x) < 3:
        raise Unmodelled(f"InstanceNormalization needs rank >= 3, got {x}")
    return _moment_norm(numel(x), x[0] * x[1], has_bias=True)


@register("GroupNormalization")
def group_normalization(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    groups = int(node.attr("num_groups", 1))
    if len(x) < 2 or groups < 1:
        raise Unmodelled(f"GroupNormalization of {x} with num_groups={groups}")
    return _moment_norm(numel(x), x[0] * groups, has_bias=True)


@register("MeanVarianceNormalization")
def mean_variance_normalization(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    axes = [int(a) for a in node.attr("axes", [0, 2, 3])]
    if any(not -len(x) <= a < len(x) for a in axes):
        raise Unmodelled(f"axes {axes} are out of range for rank {len(x)}")
    kept = [d for i, d in enumerate(x) if i not in {a % len(x) for a in axes}]
    per_element = MOMENT_NORM_OPS_PER_ELEMENT - 2  # no scale, no bias
    return arithmetic(per_element * numel(x) + MOMENT_NORM_OPS_PER_ROW * numel(kept))


@register("RMSNormalization")
def rms_normalization(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    rows = _rows_from_axis(x, _axis(node, len(x), -1))
    return arithmetic(RMS_NORM_OPS_PER_ELEMENT * numel(x) + RMS_NORM_OPS_PER_ROW * rows)


@register("LpNormalization")
def lp_normalization(node: Node) -> OpWork:
    """p=2: square, add, divide per element and a sqrt per row; p=1: abs, add, divide."""
    p = int(node.attr("p", 2))
    if p not in (1, 2):
        raise Unmodelled(f"LpNormalization p={p} is not an ONNX mode")
    x = input_shape(node, 0, "X")
    axis = _axis(node, len(x), -1)
    rows = numel(x) // x[axis] if x[axis] else 0
    return arithmetic(3 * numel(x) + (rows if p == 2 else 0))


@register("LRN")
def lrn(node: Node) -> OpWork:
    """Square-sum over ``size`` neighbours (2 per neighbour), then bias, scale, pow, divide."""
    x = input_shape(node, 0, "X")
    size = int(node.attr("size", 1))
    if size < 1:
        raise Unmodelled(f"LRN size={size} must be positive")
    return arithmetic((2 * size + 4) * numel(x))


@register("Softmax", "LogSoftmax", "Hardmax")
def softmax(node: Node) -> OpWork:
    x = input_shape(node, 0, "X")
    if not x:
        raise Unmodelled("softmax of a scalar")
    _axis(node, len(x), -1)
    if node.op_type == "Softmax":
        return arithmetic(SOFTMAX_OPS_PER_ELEMENT * numel(x))
    if node.op_type == "Hardmax":
        return arithmetic(HARDMAX_OPS_PER_ELEMENT * numel(x))
    axis = _axis(node, len(x), -1)
    rows = numel(x) // x[axis] if x[axis] else 0
    return arithmetic(LOG_SOFTMAX_OPS_PER_ELEMENT * numel(x) + LOG_SOFTMAX_OPS_PER_ROW * rows)
