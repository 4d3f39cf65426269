"""Quantized ops: the same MACs and GEMMs as the float op; the bytes come from dtypes.

The profiler counts byte sizes from each tensor's dtype, so an INT8 conv moves a
quarter of the float bytes for the same MACs. Extra vector work: requantizing
each output (scale multiply, round, add zero point, clamp to the range = 5 ops)
and the zero-point corrections that cannot be folded offline. With
sum_k (x - zx)(w - zw) = sum_k x·w - zw·sum_k x - zx·sum_k w + K·zx·zw, the terms
with sum_k w are per-output-channel constants when w is a parameter: runtimes
fold them into the bias (common practice, no source). What is left is one add
per element of an operand whose partner's zero point is not known to be zero
(its row or column sums). A float op the graph says runs at an integer
precision (a QDQ Conv whose output is requantized) gets the same
requantization (``requantized``), so QDQ, QOperator and ``--precision int8``
forms of one model cost the same.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import add_work, arithmetic, input_shape, numel
from gate.ops.conv import conv_work
from gate.ops.matmul import matmul_work
from gate.ops.registry import OpWork, register

REQUANTIZE_OPS_PER_OUTPUT = 5
QUANTIZE_OPS_PER_ELEMENT = 5  # divide by scale, round, add zero point, clamp (min, max)
DEQUANTIZE_OPS_PER_ELEMENT = 2  # subtract zero point, multiply by scale
# DynamicQuantizeLinear: running min and max (2/element) then quantize (5/element);
# per tensor: scale = (max - min) / 255 and the zero point (round, clamp): 6 ops.
DYNAMIC_QUANTIZE_OPS_PER_ELEMENT, DYNAMIC_QUANTIZE_OPS_PER_TENSOR = 7, 6


def _outputs_of(work: OpWork) -> int:
    return sum(g.m * g.n * g.count for g in work.gemms)


def _zero_point_ops(node: Node, x_pos: int, w_pos: int, x_zp_pos: int, w_zp_pos: int) -> int:
    """Row/column sums the zero-point corrections need per inference (see the module doc)."""
    ops = numel(input_shape(node, x_pos, "X")) if _maybe_nonzero(node, w_zp_pos) else 0
    if not node.is_param(w_pos) and _maybe_nonzero(node, x_zp_pos):
        ops += numel(input_shape(node, w_pos, "W"))
    return ops


def _maybe_nonzero(node: Node, position: int) -> bool:
    """True when a zero point is given and not known to be all zeros."""
    if node.input(position) is None:
        return False
    values = node.const_values.get(position)
    return values is None or any(values)


def _quantized_matrix_op(core: OpWork, zero_point_ops: int, requantize: bool) -> OpWork:
    requant = REQUANTIZE_OPS_PER_OUTPUT * _outputs_of(core) if requantize else 0
    return add_work([core, arithmetic(zero_point_ops + requant)])


def requantized(work: OpWork) -> OpWork:
    """``work`` of a float matrix op that runs at an integer precision and writes integer
    outputs, plus the requantization of each output (as QLinearConv does)."""
    ops = REQUANTIZE_OPS_PER_OUTPUT * _outputs_of(work)
    return add_work([work, arithmetic(ops, note="requantizes its outputs (integer precision)")])


QOPERATOR_OPS = ("QLinearConv", "ConvInteger", "QLinearMatMul", "MatMulInteger")


@register("QLinearConv")
def qlinear_conv(node: Node) -> OpWork:
    core = conv_work(node, x_pos=0, w_pos=3, bias_pos=8)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 3, 2, 5), requantize=True)


@register("ConvInteger")
def conv_integer(node: Node) -> OpWork:
    core = conv_work(node, x_pos=0, w_pos=1, bias_pos=None)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 1, 2, 3), requantize=False)


@register("QLinearMatMul")
def qlinear_matmul(node: Node) -> OpWork:
    core = matmul_work(node, a_pos=0, b_pos=3)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 3, 2, 5), requantize=True)


@register("MatMulInteger")
def matmul_integer(node: Node) -> OpWork:
    core = matmul_work(node, a_pos=0, b_pos=1)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 1, 2, 3), requantize=False)


@register("QuantizeLinear")
def quantize_linear(node: Node) -> OpWork:
    return arithmetic(QUANTIZE_OPS_PER_ELEMENT * numel(input_shape(node, 0, "x")))


@register("DequantizeLinear")
def dequantize_linear(node: Node) -> OpWork:
    return arithmetic(DEQUANTIZE_OPS_PER_ELEMENT * numel(input_shape(node, 0, "x")))


@register("DynamicQuantizeLinear")
def dynamic_quantize_linear(node: Node) -> OpWork:
    elements = numel(input_shape(node, 0, "x"))
    return arithmetic(DYNAMIC_QUANTIZE_OPS_PER_ELEMENT * elements + DYNAMIC_QUANTIZE_OPS_PER_TENSOR)
