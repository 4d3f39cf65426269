"""Output spatial sizes of Conv, ConvTranspose and the windowed pools (ONNX operator spec).

Cost functions prefer the shape-inferred output shape of the node; these
formulas are the fallback and are tested against ``onnx.shape_inference``.
"""

from __future__ import annotations

from collections.abc import Sequence
from math import ceil

from gate.model.graph import Node
from gate.ops._common import int_attr_list, str_attr
from gate.ops.registry import Unmodelled

_AUTO_PADS = ("NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID")


def auto_pad(node: Node) -> str:
    """The node's auto_pad mode; an unknown mode is Unmodelled."""
    mode = str_attr(node, "auto_pad", "NOTSET")
    if mode not in _AUTO_PADS:
        raise Unmodelled(f"auto_pad={mode!r} is not an ONNX auto_pad mode")
    return mode


def window_output_size(size: int, kernel: int, stride: int, dilation: int,
                       pad_begin: int, pad_end: int, mode: str, ceil_mode: bool = False) -> int:
    """One spatial axis of a Conv/pool output (ONNX Conv and MaxPool spec formulas)."""
    effective_kernel = (kernel - 1) * dilation + 1
    if mode in ("SAME_UPPER", "SAME_LOWER"):
        return ceil(size / stride)
    if mode == "VALID":
        pad_begin = pad_end = 0
    pad_total = pad_begin + pad_end
    span = size + pad_total - effective_kernel
    if span < 0:
        raise Unmodelled(f"kernel extent {effective_kernel} exceeds padded input {size + pad_total}")
    steps = ceil(span / stride) if ceil_mode else span // stride
    if ceil_mode and mode == "NOTSET" and steps * stride >= size + pad_begin:
        steps -= 1  # ceil mode: the last window must start inside the input or left padding
    return steps + 1


def _require_positive(name: str, values: Sequence[int]) -> None:
    if any(v < 1 for v in values):
        raise Unmodelled(f"{name} {list(values)} must be positive")


def window_output_spatial(node: Node, spatial: Sequence[int], kernel: Sequence[int],
                          ceil_mode: bool = False) -> tuple[int, ...]:
    """Output spatial dims of a Conv or windowed pool from its attributes."""
    rank = len(spatial)
    strides = int_attr_list(node, "strides", rank, 1)
    dilations = int_attr_list(node, "dilations", rank, 1)
    pads = int_attr_list(node, "pads", 2 * rank, 0)
    mode = auto_pad(node)
    for name, checked in (("kernel", kernel), ("strides", strides), ("dilations", dilations)):
        _require_positive(name, checked)
    return tuple(
        window_output_size(spatial[i], kernel[i], strides[i], dilations[i],
                           pads[i], pads[i + rank], mode, ceil_mode)
        for i in range(rank))


def transpose_output_spatial(node: Node, spatial: Sequence[int],
                             kernel: Sequence[int]) -> tuple[int, ...]:
    """Output spatial dims of ConvTranspose (ONNX ConvTranspose spec formulas)."""
    rank = len(spatial)
    explicit = node.attr("output_shape")
    if explicit:
        sizes = tuple(int(v) for v in explicit)[-rank:]
        if len(sizes) != rank or any(size < 0 for size in sizes):
            raise Unmodelled(f"output_shape {list(explicit)} does not fit {rank} spatial dims")
        return sizes
    strides = int_attr_list(node, "strides", rank, 1)
    dilations = int_attr_list(node, "dilations", rank, 1)
    out_pad = int_attr_list(node, "output_padding", rank, 0)
    pads = int_attr_list(node, "pads", 2 * rank, 0)
    mode = auto_pad(node)
    for name, checked in (("kernel", kernel), ("strides", strides), ("dilations", dilations)):
        _require_positive(name, checked)
    if mode in ("SAME_UPPER", "SAME_LOWER"):
        return tuple(spatial[i] * strides[i] for i in range(rank))
    if mode == "VALID":
        pads = [0] * (2 * rank)
    sizes = tuple(
        strides[i] * (spatial[i] - 1) + out_pad[i] + (kernel[i] - 1) * dilations[i] + 1
        - pads[i] - pads[i + rank]
        for i in range(rank))
    if any(size < 0 for size in sizes):
        raise Unmodelled(f"output size {list(sizes)} is negative (pads exceed the output)")
    return sizes
