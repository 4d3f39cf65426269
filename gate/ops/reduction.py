"""Reductions, arg-reductions, cumulative sums and TopK: vector work, no MACs.

A reduction visits every input element once (one combine each, plus any
per-element transform such as a square or exp) and finishes each output
element with a fixed number of ops (a divide for a mean, a sqrt for L2, a log
for log-sum). Counts are independent of which axes are reduced, so the axes
input need not be known (common practice, no source).
"""

from __future__ import annotations

from collections.abc import Mapping

from gate.model.graph import Node
from gate.ops._common import arithmetic, input_shape, numel, output_shape
from gate.ops.registry import OpWork, Unmodelled, register

# (ops per input element, ops per output element)
REDUCE_OPS: Mapping[str, tuple[int, int]] = {
    "ReduceSum": (1, 0), "ReduceMax": (1, 0), "ReduceMin": (1, 0), "ReduceProd": (1, 0),
    "ReduceMean": (1, 1),  # divide per output
    "ReduceL1": (2, 0),  # abs, add
    "ReduceL2": (2, 1),  # square, add; sqrt
    "ReduceSumSquare": (2, 0),  # square, add
    "ReduceLogSum": (1, 1),  # add; log
    "ReduceLogSumExp": (3, 2),  # max, exp, add; log, add back the max
    "ArgMax": (1, 0), "ArgMin": (1, 0),  # compare
}


@register(*REDUCE_OPS)
def reduce(node: Node) -> OpWork:
    per_input, per_output = REDUCE_OPS[node.op_type]
    elements = numel(input_shape(node, 0, "data"))
    return arithmetic(per_input * elements + per_output * numel(output_shape(node)))


@register("CumSum")
def cumsum(node: Node) -> OpWork:
    """One add per element along the axis."""
    return arithmetic(numel(input_shape(node, 0, "x")))


@register("TopK")
def top_k(node: Node) -> OpWork:
    """Selection with a size-k heap: about log2(k)+1 compares per input element."""
    x = input_shape(node, 0, "X")
    values = output_shape(node, 0)
    if not x:
        raise Unmodelled("TopK of a scalar")
    axis = int(node.attr("axis", -1)) % len(x)
    k = values[axis] if len(values) == len(x) else 0
    if k < 1:
        raise Unmodelled("TopK: k is not known from the output shape")
    return arithmetic(numel(x) * k.bit_length())
