"""Gemm, MatMul (batched, broadcasting) and two-operand Einsum contractions.

Orientation: the K x N operand is the one a weight-stationary array holds. When
the parameter (initializer) is the right operand the batch folds into M; when
it is the left operand we use Y^T = B^T A^T, so the parameter is still the
stationary operand (M and N swap). Activation x activation products (attention
Q@K^T, attn@V) are ``count`` = broadcast batch GEMMs with
``weights_are_params=False``. Only initializer inputs count as parameters: a
QDQ model whose weight comes from DequantizeLinear reads as activation x
activation here (the loader sees no initializer on that input).
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, broadcast, input_shape, numel, str_attr
from gate.ops.einsum import einsum_work
from gate.ops.registry import GemmShape, OpWork, Unmodelled, register


def orient_gemm(m: int, k: int, n: int, batch: int, a_param: bool, b_param: bool,
                fold_batch: bool) -> GemmShape:
    """The GemmShape for ``batch`` products (m x k) @ (k x n), parameter kept stationary.

    ``fold_batch`` says the parameter operand has no batch dims of its own, so the
    batch can be streamed as extra rows through one stationary weight.
    """
    if b_param:
        return GemmShape(m=batch * m, k=k, n=n) if fold_batch else GemmShape(m, k, n, batch)
    if a_param:
        return GemmShape(m=batch * n, k=k, n=m) if fold_batch else GemmShape(n, k, m, batch)
    return GemmShape(m, k, n, batch, weights_are_params=False)


def matmul_work(node: Node, a_pos: int = 0, b_pos: int = 1) -> OpWork:
    """Work of numpy-semantics matmul of inputs ``a_pos`` and ``b_pos``."""
    a = input_shape(node, a_pos, "A")
    b = input_shape(node, b_pos, "B")
    if not a or not b:
        raise Unmodelled("MatMul with a scalar operand is not a matrix product")
    m, k = (1, a[0]) if len(a) == 1 else a[-2:]
    k_b, n = (b[0], 1) if len(b) == 1 else b[-2:]
    if k != k_b:
        raise Unmodelled(f"MatMul inner dims differ: {a} @ {b}")
    batch_a, batch_b = a[:-2], b[:-2]
    batch = numel(broadcast([batch_a, batch_b]))
    a_param, b_param = node.is_param(a_pos), node.is_param(b_pos)
    param_batch = numel(batch_b) if b_param else numel(batch_a)
    gemm = orient_gemm(m, k, n, batch, a_param, b_param, fold_batch=param_batch == 1)
    return arithmetic(0, macs=gemm.macs, gemms=(gemm,))


@register("MatMul")
def matmul(node: Node) -> OpWork:
    return matmul_work(node)


def gemm_shape(node: Node, a_pos: int = 0, b_pos: int = 1) -> GemmShape:
    """The GemmShape of Gemm-semantics A' B' (transA/transB applied) of two 2-D inputs."""
    a = input_shape(node, a_pos, "A")
    b = input_shape(node, b_pos, "B")
    if len(a) != 2 or len(b) != 2:
        raise Unmodelled(f"{node.op_type} needs 2-D inputs, got {a} and {b}")
    m, k = (a[1], a[0]) if node.attr("transA", 0) else a
    k_b, n = (b[1], b[0]) if node.attr("transB", 0) else b
    if k != k_b:
        raise Unmodelled(f"{node.op_type} inner dims differ: {a} and {b} (transA/transB applied)")
    return orient_gemm(m, k, n, 1, node.is_param(a_pos), node.is_param(b_pos), fold_batch=True)


@register("Gemm")
def gemm(node: Node) -> OpWork:
    """Y = alpha * A' B' + beta * C: 1 op per output for the C add, the alpha and beta scales."""
    shape = gemm_shape(node)
    outputs = shape.m * shape.n
    extra = outputs if float(node.attr("alpha", 1.0)) != 1.0 else 0
    if node.input(2) is not None:
        extra += outputs * (2 if float(node.attr("beta", 1.0)) != 1.0 else 1)
    return arithmetic(extra, macs=shape.macs, gemms=(shape,))


@register("Einsum")
def einsum(node: Node) -> OpWork:
    shapes = [input_shape(node, i) for i in range(len(node.inputs))]
    params = [node.is_param(i) for i in range(len(shapes))]
    return einsum_work(str_attr(node, "equation", ""), shapes, params)
