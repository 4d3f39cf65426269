"""Fused matrix ops of the ``com.microsoft`` domain: a standard op plus its epilogue.

Each costs exactly its decomposition into standard ONNX ops (the tests build both):

- ``FusedConv`` = Conv (+ Add of the optional sum input Z) + activation;
- ``FusedGemm`` = Gemm + activation;
- ``FusedMatMul`` = Transpose of the last two dims as asked + MatMul (+ Mul by alpha);
- ``MatMulNBits`` = DequantizeLinear of the blockwise-quantized weight + MatMul (+ Add
  of the optional bias); the profile folds the dequantization of a constant weight
  offline, so, as in the decomposition, it adds no per-inference work.

Input orders and attributes follow the public contrib-op documentation
(ContribOperators.md); the ``activation``/``activation_params`` names of FusedConv
and FusedGemm and MatMulNBits' packed layout ``[N, K / block_size, block_size *
bits / 8]`` are from memory. MatMulNBits' parameters are those of the decomposition:
N x K weights at ``bits`` bits each (``gate.model.constants.logical_source`` reads the
packed uint8 tensor as the logical weights it holds), so count and bytes both equal
the int4 ``[K, N]`` weight's; its scales and zero points are quantization metadata, as
a DequantizeLinear's are.
"""

from __future__ import annotations

from dataclasses import replace

from gate.model.graph import Node, TensorInfo
from gate.ops._common import (
    add_work,
    arithmetic,
    gemm_output_elements,
    input_shape,
    numel,
    str_attr,
)
from gate.ops.conv import conv_work
from gate.ops.elementwise import UNARY_OPS_PER_ELEMENT
from gate.ops.matmul import gemm, matmul_work
from gate.ops.registry import GemmShape, OpWork, Unmodelled, register

MS = "com.microsoft"
# Activations FusedConv/FusedGemm accept (from memory), costed as the standard op.
FUSABLE_ACTIVATIONS = ("Relu", "Tanh", "Sigmoid", "LeakyRelu", "Clip", "HardSigmoid")


def _activation_ops(node: Node) -> int:
    """Operations per output element of the fused activation (0 when none is named)."""
    name = str_attr(node, "activation", "")
    if not name:
        return 0
    if name not in FUSABLE_ACTIVATIONS:
        raise Unmodelled(f"{node.op_type} activation {name!r} is not one we know")
    return UNARY_OPS_PER_ELEMENT[name]


@register("FusedConv", domain=MS)
def fused_conv(node: Node) -> OpWork:
    """Conv(X, W, B) + Z (input 3) then the activation, per output element."""
    core = conv_work(node, x_pos=0, w_pos=1, bias_pos=2)
    outputs = gemm_output_elements(core)
    per_output = _activation_ops(node) + (1 if node.input(3) is not None else 0)
    return add_work([core, arithmetic(per_output * outputs)])


@register("FusedGemm", domain=MS)
def fused_gemm(node: Node) -> OpWork:
    core = gemm(node)
    return add_work([core, arithmetic(_activation_ops(node) * gemm_output_elements(core))])


def _transposed(tensor: TensorInfo | None, shape: tuple[int, ...]) -> TensorInfo | None:
    if tensor is None or len(shape) < 2:
        return tensor
    return TensorInfo(tensor.name, (*shape[:-2], shape[-1], shape[-2]), tensor.dtype)


@register("FusedMatMul", domain=MS)
def fused_matmul(node: Node) -> OpWork:
    """MatMul of the (transA/transB) transposed operands, times alpha when alpha != 1."""
    if node.attr("transBatchA", 0) or node.attr("transBatchB", 0):
        raise Unmodelled("FusedMatMul transBatchA/transBatchB are not modelled")
    a, b = input_shape(node, 0, "A"), input_shape(node, 1, "B")
    inputs = list(node.inputs)
    if node.attr("transA", 0):
        inputs[0] = _transposed(node.input(0), a)
    if node.attr("transB", 0):
        inputs[1] = _transposed(node.input(1), b)
    core = matmul_work(replace(node, inputs=tuple(inputs)))
    scaled = float(node.attr("alpha", 1.0)) != 1.0
    return add_work([core, arithmetic(gemm_output_elements(core) if scaled else 0)])


def _nbits_sizes(node: Node) -> tuple[int, int, int]:
    """(rows of A, K, N) of a MatMulNBits node, checked against its packed weight."""
    a = input_shape(node, 0, "A")
    k, n = int(node.attr("K", 0)), int(node.attr("N", 0))
    bits, block = int(node.attr("bits", 4)), int(node.attr("block_size", 0))
    if not a or a[-1] != k or k < 1 or n < 1 or block < 1 or bits < 1:
        raise Unmodelled(f"MatMulNBits A {a} with K={k}, N={n}, block_size={block}, bits={bits}")
    packed = input_shape(node, 1, "B")
    blocks = -(-k // block)
    if numel(packed) != n * blocks * (block * bits // 8):
        raise Unmodelled(f"MatMulNBits packed weight {packed} does not hold {n} x {k} "
                         f"{bits}-bit values in blocks of {block}")
    return numel(a[:-1]), k, n


@register("MatMulNBits", domain=MS)
def matmul_nbits(node: Node) -> OpWork:
    """The GEMM on the K x N weight (dequantized offline), plus the bias add."""
    rows, k, n = _nbits_sizes(node)
    shape = GemmShape(m=rows, k=k, n=n, weights_are_params=node.is_param(1))
    bias = rows * n if node.input(5) is not None else 0
    return arithmetic(bias, macs=shape.macs, gemms=(shape,))
