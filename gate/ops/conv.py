"""Conv and ConvTranspose: MACs and the GEMM each maps to (im2col / col2im view).

Conv maps to ``groups`` GEMMs with M = batch x output pixels, K = (Cin/groups)
x kernel elements, N = Cout/groups; a depthwise conv is C GEMMs with K = kernel
elements and N = channel multiplier, which is why it under-fills a PE array.
MACs include the window positions that fall on zero padding (the array
performs them). The weights are treated as parameters even when they arrive
through a DequantizeLinear (QDQ models): they are constant per inference.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import arithmetic, inferred_output_shape, input_shape, numel
from gate.ops._spatial import auto_pad, transpose_output_spatial, window_output_spatial
from gate.ops.registry import GemmShape, OpWork, Unmodelled, register


def _groups(node: Node) -> int:
    groups = int(node.attr("group", 1))
    if groups < 1:
        raise Unmodelled(f"group={groups} is not a positive group count")
    return groups


def _check_ranks(x: tuple[int, ...], w: tuple[int, ...]) -> None:
    if len(x) < 3 or len(w) != len(x):
        raise Unmodelled(f"input rank {len(x)} and weight rank {len(w)} do not form a convolution")


def _output_spatial(node: Node, x: tuple[int, ...], kernel: tuple[int, ...],
                    transposed: bool) -> tuple[int, ...]:
    # Checked even when inference supplied the shape: onnx infers through a bad attribute.
    auto_pad(node)
    declared = node.attr("kernel_shape")
    if declared and tuple(int(k) for k in declared) != tuple(kernel):
        raise Unmodelled(f"kernel_shape {list(declared)} does not match the weight's kernel "
                         f"{list(kernel)}")
    inferred = inferred_output_shape(node)
    if inferred is not None and len(inferred) == len(x):
        return inferred[2:]
    if transposed:
        return transpose_output_spatial(node, x[2:], kernel)
    return window_output_spatial(node, x[2:], kernel)


def conv_work(node: Node, x_pos: int = 0, w_pos: int = 1, bias_pos: int | None = 2) -> OpWork:
    """Work of a (possibly grouped, dilated, strided, padded) N-d convolution."""
    x = input_shape(node, x_pos, "X")
    w = input_shape(node, w_pos, "W")
    _check_ranks(x, w)
    groups = _groups(node)
    batch, channels = x[0], x[1]
    out_channels, group_channels, kernel = w[0], w[1], w[2:]
    if channels != group_channels * groups or out_channels % groups:
        raise Unmodelled(f"channels {channels}, weight {w} and group={groups} are inconsistent")
    spatial_out = _output_spatial(node, x, kernel, transposed=False)
    if any(k < 1 for k in kernel):
        raise Unmodelled(f"weight {w} has an empty kernel")
    gemm = GemmShape(m=batch * numel(spatial_out), k=group_channels * numel(kernel),
                     n=out_channels // groups, count=groups, weights_are_params=True)
    has_bias = bias_pos is not None and node.input(bias_pos) is not None
    bias_adds = batch * out_channels * numel(spatial_out) if has_bias else 0
    return arithmetic(bias_adds, macs=gemm.macs, gemms=(gemm,))


@register("Conv")
def conv(node: Node) -> OpWork:
    return conv_work(node)


@register("ConvTranspose")
def conv_transpose(node: Node) -> OpWork:
    """Each input pixel scatters into a kernel window: GEMM M = batch x input pixels,
    K = Cin/groups, N = (Cout/groups) x kernel elements, then col2im accumulates."""
    x = input_shape(node, 0, "X")
    w = input_shape(node, 1, "W")
    _check_ranks(x, w)
    groups = _groups(node)
    batch, channels = x[0], x[1]
    if w[0] != channels or channels % groups:
        raise Unmodelled(f"channels {channels}, weight {w} and group={groups} are inconsistent")
    out_channels, kernel = w[1] * groups, w[2:]
    if any(k < 1 for k in kernel):
        raise Unmodelled(f"weight {w} has an empty kernel")
    gemm = GemmShape(m=batch * numel(x[2:]), k=channels // groups, n=w[1] * numel(kernel),
                     count=groups, weights_are_params=True)
    spatial_out = _output_spatial(node, x, kernel, transposed=True)
    bias_adds = batch * out_channels * numel(spatial_out) if node.input(2) is not None else 0
    return arithmetic(bias_adds, macs=gemm.macs, gemms=(gemm,))
