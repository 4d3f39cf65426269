"""Quantized ops: the same MACs and GEMMs as the float op; the bytes come from dtypes.

The profiler counts byte sizes from each tensor's dtype, so an INT8 conv moves a
quarter of the float bytes for the same MACs. Extra vector work: subtracting the
activation zero point (1 op per input element, when a zero point is given) and
requantizing each output (scale multiply, round, add zero point, clamp to the
range = 5 ops). Weight zero points are folded once per model by runtimes, not
counted per inference (common practice, no source).
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


def _zero_point_ops(node: Node, x_pos: int, zero_point_pos: int) -> int:
    if node.input(zero_point_pos) is None:
        return 0
    return numel(input_shape(node, x_pos, "X"))


def _quantized_matrix_op(core: OpWork, zero_point_ops: int, requantize: bool) -> OpWork:
    requant = REQUANTIZE_OPS_PER_OUTPUT * _outputs_of(core) if requantize else 0
    return add_work([core, arithmetic(zero_point_ops + requant)])


@register("QLinearConv")
def qlinear_conv(node: Node) -> OpWork:
    core = conv_work(node, x_pos=0, w_pos=3, bias_pos=8)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 2), requantize=True)


@register("ConvInteger")
def conv_integer(node: Node) -> OpWork:
    core = conv_work(node, x_pos=0, w_pos=1, bias_pos=None)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 2), requantize=False)


@register("QLinearMatMul")
def qlinear_matmul(node: Node) -> OpWork:
    core = matmul_work(node, a_pos=0, b_pos=3)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 2), requantize=True)


@register("MatMulInteger")
def matmul_integer(node: Node) -> OpWork:
    core = matmul_work(node, a_pos=0, b_pos=1)
    return _quantized_matrix_op(core, _zero_point_ops(node, 0, 2), requantize=False)


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
