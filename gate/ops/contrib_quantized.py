"""QOperator-format ops of the ``com.microsoft`` domain (what the onnx quantization tools emit).

The elementwise, pooling and concat forms cost their QDQ decomposition into
standard ops: DequantizeLinear of every quantized input (2 ops per element), the
float op, QuantizeLinear of the output (5 ops per element), with the constants of
``gate.ops.quantized``. Bytes come from the tensor dtypes as for every op.

``QGemm`` follows the standard ``QLinearMatMul`` convention instead (integer GEMM,
the zero-point corrections that cannot be folded, 5 per output to requantize when an
output scale is given; see ``gate.ops.quantized``), plus 1 per output for the bias
input C and for alpha != 1; with neither it costs exactly a QLinearMatMul of the same
operands.

``DynamicQuantizeMatMul`` costs its decomposition DynamicQuantizeLinear(A) ->
MatMulInteger -> Cast -> Mul(a_scale, b_scale) -> Mul -> [Add bias], the pattern the
runtime's graph optimizer fuses into it.

Input orders follow the public contrib-op documentation (ContribOperators.md):
DynamicQuantizeMatMul (A, B, b_scale, b_zero_point, bias),
QLinearAdd/Mul (A, A_scale, A_zp, B, B_scale, B_zp, C_scale, C_zp), the unary and
pool forms (X, X_scale, X_zp, Y_scale, Y_zp), QLinearConcat (Y_scale, Y_zp, then
(X, X_scale, X_zp) per input), QGemm (A, a_scale, a_zp, B, b_scale, b_zp, C,
y_scale, y_zp); the ``channels_last`` attribute of the pools is from memory.
"""

from __future__ import annotations

from dataclasses import replace

from gate.model.graph import Node, TensorInfo
from gate.ops._common import (
    add_work,
    arithmetic,
    broadcast,
    gemm_output_elements,
    input_shape,
    numel,
    output_shape,
)
from gate.ops.elementwise import UNARY_OPS_PER_ELEMENT
from gate.ops.matmul import gemm_shape
from gate.ops.normalization import SOFTMAX_OPS_PER_ELEMENT
from gate.ops.pooling import global_pool, windowed_pool
from gate.ops.quantized import (  # the QLinearMatMul convention, one owner
    DEQUANTIZE_OPS_PER_ELEMENT,
    QUANTIZE_OPS_PER_ELEMENT,
    _quantized_matrix_op,
    _zero_point_ops,
    dynamic_quantize_linear,
    matmul_integer,
)
from gate.ops.registry import OpWork, Unmodelled, register

MS = "com.microsoft"
# The float op inside each unary QLinear* op, operations per element.
QLINEAR_UNARY_FLOAT_OPS = {
    "QLinearSigmoid": UNARY_OPS_PER_ELEMENT["Sigmoid"],
    "QLinearLeakyRelu": UNARY_OPS_PER_ELEMENT["LeakyRelu"],
    "QLinearSoftmax": SOFTMAX_OPS_PER_ELEMENT,
}


def _qdq(dequantized_elements: int, float_ops: int, quantized_elements: int) -> OpWork:
    """DequantizeLinear of the inputs, the float op, QuantizeLinear of the output."""
    return arithmetic(DEQUANTIZE_OPS_PER_ELEMENT * dequantized_elements + float_ops
                      + QUANTIZE_OPS_PER_ELEMENT * quantized_elements)


@register("QLinearAdd", "QLinearMul", domain=MS)
def qlinear_binary(node: Node) -> OpWork:
    a, b = input_shape(node, 0, "A"), input_shape(node, 3, "B")
    outputs = numel(broadcast([a, b]))
    return _qdq(numel(a) + numel(b), outputs, outputs)


@register(*QLINEAR_UNARY_FLOAT_OPS, domain=MS)
def qlinear_unary(node: Node) -> OpWork:
    elements = numel(input_shape(node, 0, "X"))
    return _qdq(elements, QLINEAR_UNARY_FLOAT_OPS[node.op_type] * elements, elements)


@register("QLinearConcat", domain=MS)
def qlinear_concat(node: Node) -> OpWork:
    """Dequantize each input, concatenate (a copy: elements written), quantize the result."""
    positions = range(2, len(node.inputs), 3)
    if not positions:
        raise Unmodelled("QLinearConcat has no inputs to concatenate")
    elements = sum(numel(input_shape(node, p, f"input {p}")) for p in positions)
    return add_work([_qdq(elements, 0, elements), OpWork(vector_ops=elements)])


def _channels_first(tensor: TensorInfo, shape: tuple[int, ...]) -> TensorInfo:
    """NHWC -> NCHW view of a tensor (``channels_last=1`` pools)."""
    if len(shape) < 3:
        raise Unmodelled(f"channels_last pool input {shape} needs rank >= 3")
    return TensorInfo(tensor.name, (shape[0], shape[-1], *shape[1:-1]), tensor.dtype)


def _float_pool(node: Node, op_type: str) -> tuple[OpWork, int, int]:
    """The float pool on X (seen as NCHW) and the element counts of X and Y."""
    x = input_shape(node, 0, "X")
    y = output_shape(node)
    x_info, y_info = node.inputs[0], node.outputs[0]
    assert x_info is not None  # input_shape above checked it
    if node.attr("channels_last", 0):
        x_info, y_info = _channels_first(x_info, x), _channels_first(y_info, y)
    pool = replace(node, op_type=op_type, inputs=(x_info,), outputs=(y_info,))
    work = global_pool(pool) if op_type.startswith("Global") else windowed_pool(pool)
    return work, numel(x), numel(y)


@register("QLinearGlobalAveragePool", "QLinearAveragePool", domain=MS)
def qlinear_pool(node: Node) -> OpWork:
    work, inputs, outputs = _float_pool(node, node.op_type.replace("QLinear", ""))
    return add_work([work, _qdq(inputs, 0, outputs)])


@register("QGemm", domain=MS)
def qgemm(node: Node) -> OpWork:
    """QLinearMatMul's work on the (transA/transB) operands, plus C and alpha per output."""
    shape = gemm_shape(node, a_pos=0, b_pos=3)
    core = arithmetic(0, macs=shape.macs, gemms=(shape,))
    quantized = _quantized_matrix_op(core, _zero_point_ops(node, 0, 3, 2, 5),
                                     requantize=node.input(7) is not None)
    per_output = (1 if node.input(6) is not None else 0) + (
        1 if float(node.attr("alpha", 1.0)) != 1.0 else 0)
    return add_work([quantized, arithmetic(per_output * shape.m * shape.n)])


@register("DynamicQuantizeMatMul", domain=MS)
def dynamic_quantize_matmul(node: Node) -> OpWork:
    """(A float, B int8, b_scale, b_zero_point?, bias?): DynamicQuantizeLinear of A,
    MatMulInteger with A's run-time zero point, Cast, the two scales' product, the scale
    Mul per output and the bias Add, each costed as that standard op."""
    a = input_shape(node, 0, "A")
    scale = numel(input_shape(node, 2, "b_scale"))
    integer = replace(node, op_type="MatMulInteger", param_inputs=node.param_inputs - {2, 4},
                      inputs=(TensorInfo("A_quantized", a, "UINT8"), node.input(1),
                              TensorInfo("A_zero_point", (), "UINT8"), node.input(3)))
    core = matmul_integer(integer)
    outputs = gemm_output_elements(core)
    per_output = 1 + (1 if node.input(4) is not None else 0)  # scale Mul, bias Add
    return add_work([dynamic_quantize_linear(replace(node, inputs=(node.input(0),))), core,
                     arithmetic(scale + per_output * outputs)])
