"""Fused elementwise and normalisation ops of the ``com.microsoft`` domain.

Each costs its decomposition into standard ONNX ops, with the per-element
constants of ``gate.ops.elementwise`` and ``gate.ops.normalization``:

- ``Gelu`` = Gelu (erf form); ``BiasGelu`` = Add + Gelu; ``FastGelu`` = [Add bias] +
  Gelu(approximate="tanh"); ``QuickGelu`` = x * Sigmoid(alpha * x) (Mul, Sigmoid, Mul);
- ``BiasAdd`` = X + bias + skip (two Adds);
- ``SkipLayerNormalization`` = input + skip [+ bias] then LayerNormalization(gamma,
  [beta]); ``SkipSimplifiedLayerNormalization`` = the same with RMSNormalization;
- ``SimplifiedLayerNormalization`` = RMSNormalization (registered in the default
  domain, where the runtime that defines it puts it, and in ``com.microsoft``);
- ``EmbedLayerNormalization`` = Gathers of the word, position (and segment) embeddings
  (copies), their Adds, LayerNormalization, and ReduceSum of the mask per row for the
  mask index (input and output order from the public contrib-op documentation).

Optional outputs (mean, inverse std, the input+skip+bias sum) are values the
decomposition computes anyway; writing them adds bytes, not operations.
Input orders follow the public contrib-op documentation (ContribOperators.md);
SkipLayerNormalization's (input, skip, gamma, beta, bias) order, QuickGelu's alpha
default 1.702 and SimplifiedLayerNormalization's domain are from memory.
"""

from __future__ import annotations

from dataclasses import replace

from gate.model.graph import Node, TensorInfo
from gate.ops._common import (
    add_work,
    arithmetic,
    elementwise_output_elements,
    input_shape,
    movement,
    numel,
)
from gate.ops.elementwise import GELU_OPS_PER_ELEMENT, UNARY_OPS_PER_ELEMENT
from gate.ops.normalization import layer_normalization, rms_normalization
from gate.ops.reduction import REDUCE_OPS
from gate.ops.registry import OpWork, Unmodelled, register

MS = "com.microsoft"
QUICK_GELU_OPS_PER_ELEMENT = 1 + UNARY_OPS_PER_ELEMENT["Sigmoid"] + 1  # alpha*x, sigmoid, x*s


@register("Gelu", domain=MS)
def ms_gelu(node: Node) -> OpWork:
    return arithmetic(GELU_OPS_PER_ELEMENT["none"] * elementwise_output_elements(node))


@register("BiasGelu", domain=MS)
def bias_gelu(node: Node) -> OpWork:
    return arithmetic((1 + GELU_OPS_PER_ELEMENT["none"]) * elementwise_output_elements(node))


@register("FastGelu", domain=MS)
def fast_gelu(node: Node) -> OpWork:
    bias = 1 if node.input(1) is not None else 0
    return arithmetic((bias + GELU_OPS_PER_ELEMENT["tanh"]) * elementwise_output_elements(node))


@register("QuickGelu", domain=MS)
def quick_gelu(node: Node) -> OpWork:
    return arithmetic(QUICK_GELU_OPS_PER_ELEMENT * elementwise_output_elements(node))


@register("BiasAdd", domain=MS)
def bias_add(node: Node) -> OpWork:
    return arithmetic(2 * elementwise_output_elements(node))


def _residual_adds(node: Node, bias_pos: int) -> OpWork:
    """input + skip, plus the bias add when the bias input is given."""
    elements = numel(input_shape(node, 0, "input"))
    input_shape(node, 1, "skip")
    adds = 1 + (1 if node.input(bias_pos) is not None else 0)
    return arithmetic(adds * elements)


@register("SkipLayerNormalization", domain=MS)
def skip_layer_normalization(node: Node) -> OpWork:
    """(input, skip, gamma, beta?, bias?): residual adds then LayerNorm over the last axis."""
    norm = replace(node, inputs=(node.input(0), node.input(2), node.input(3)), attributes={})
    return add_work([_residual_adds(node, bias_pos=4), layer_normalization(norm)])


@register("SkipSimplifiedLayerNormalization", domain=MS)
def skip_simplified_layer_normalization(node: Node) -> OpWork:
    """(input, skip, gamma, bias?): residual adds then RMSNorm over the last axis."""
    norm = replace(node, inputs=(node.input(0), node.input(2)), attributes={})
    return add_work([_residual_adds(node, bias_pos=3), rms_normalization(norm)])


@register("EmbedLayerNormalization", domain=MS)
def embed_layer_normalization(node: Node) -> OpWork:
    """(input_ids, segment_ids?, word, position, segment?, gamma, beta, mask?, position_ids?)."""
    ids = input_shape(node, 0, "input_ids")
    word = input_shape(node, 2, "word_embedding")
    if len(ids) != 2 or len(word) != 2:
        raise Unmodelled(f"EmbedLayerNormalization ids {ids} and table {word} must be 2-D")
    tables = 3 if node.input(4) is not None and node.input(1) is not None else 2
    elements = numel(ids) * word[1]
    norm = replace(node, inputs=(TensorInfo("sum", (*ids, word[1]), "FLOAT"), node.input(5),
                                 node.input(6)), attributes={})
    mask = numel(input_shape(node, 7, "mask")) * REDUCE_OPS["ReduceSum"][0] if node.input(
        7) is not None else 0
    return add_work([movement(tables * elements), arithmetic((tables - 1) * elements + mask),
                     layer_normalization(norm)])


@register("SimplifiedLayerNormalization")
@register("SimplifiedLayerNormalization", domain=MS)
def simplified_layer_normalization(node: Node) -> OpWork:
    return rms_normalization(node)
