"""Precision as deployed, read from the graph.

An ONNX export states how the model runs in its structure, not in a flag: an
int8 QDQ model has float Conv nodes whose inputs are DequantizeLinear of int8
tensors; a QOperator model has QLinearConv, QLinearMatMul, ConvInteger or
MatMulInteger on int8/uint8 tensors; an fp16 model has FLOAT16 tensors (often
behind a Cast). This module gives each tensor the element type it has on the
device and each layer the precision its arithmetic runs at:

- a DequantizeLinear output keeps its input's type (its reader computes on the
  quantized values, the QDQ convention of the ONNX quantization tools);
- the input of a fused QuantizeLinear (one read only by DequantizeLinear nodes)
  has the quantized type: the layer that produces it requantizes its output;
- a constant has its stored type (``gate.model.constants``); anything else its own.

A layer runs at the widest precision among its data operands (activations at
their deployed type, parameters at their stored type; integer metadata,
quantization scales and zero points and biases left out): int8 weights read with int8
activations run at int8, int8 weights with fp32 activations (weight-only
quantization) at fp32, an fp16 layer at fp16.
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache

from gate.model.constants import QUANT_METADATA_POSITIONS
from gate.model.graph import Graph, Node
from gate.targets.spec import PRECISION_BITS, normal_precision

_precision_of = lru_cache(maxsize=None)(normal_precision)  # a few dtypes, asked per layer
DEPLOYED_LABEL = "as deployed"  # the precision label when no --precision override is given
INTEGER_PRECISIONS = frozenset({"int4", "int8", "int16"})
# Bias inputs (ONNX operator spec): at an integer precision a bias is stored at the
# accumulator's width, int32 (common practice, no source), as QDQ exports store it.
BIAS_POSITIONS: Mapping[str, int] = {"Conv": 2, "ConvTranspose": 2, "Gemm": 2, "LSTM": 3,
                                     "GRU": 3, "RNN": 3}
ACCUMULATOR_BITS = 32


def is_bias(node: Node, position: int) -> bool:
    return BIAS_POSITIONS.get(node.op_type) == position and not node.domain


def deployed_dtypes(graph: Graph) -> dict[str, str]:
    """Tensor name -> element type on the device, where it differs from the exported type."""
    types: dict[str, str] = {}
    for node in graph.nodes:
        if node.op_type == "DequantizeLinear" and not node.domain and not node.folded:
            source = node.input(0)
            if source is not None and node.outputs and node.outputs[0].name:
                types[node.outputs[0].name] = types.get(source.name, source.dtype)
    for node in graph.nodes:
        if node.op_type == "QuantizeLinear" and node.qdq_absorbed:
            source = node.input(0)
            quantized = node.outputs[0].dtype if node.outputs else "UNDEFINED"
            if source is not None and quantized != "UNDEFINED":
                types[source.name] = quantized
    return types


def operand_dtypes(node: Node, deployed: Mapping[str, str]) -> list[str]:
    """Element types of the node's data operands as deployed (metadata left out)."""
    skipped = QUANT_METADATA_POSITIONS.get(node.op_type, ())
    bias = None if node.domain else BIAS_POSITIONS.get(node.op_type)  # ``is_bias``, hoisted
    sources, params = node.param_sources, node.param_inputs
    dtypes = []
    for position, tensor in enumerate(node.inputs):
        if tensor is None or position in skipped or position == bias:
            continue  # a bias is added in the accumulator, whatever its stored type
        if position in params:  # ``node.param_source`` without building a source
            source = sources.get(position)
            dtypes.append(tensor.dtype if source is None else source.dtype)
        elif position not in sources:
            dtypes.append(deployed.get(tensor.name, tensor.dtype))
        # else: small integer metadata
    return dtypes


def layer_precision(node: Node, deployed: Mapping[str, str]) -> str:
    """The precision the layer's arithmetic runs at as deployed ("" when nothing says)."""
    best, best_bits = "", 0
    for dtype in operand_dtypes(node, deployed):
        precision = _precision_of(dtype)
        if precision is not None and PRECISION_BITS[precision] > best_bits:
            best, best_bits = precision, PRECISION_BITS[precision]
    if best:
        return best
    for tensor in node.outputs:
        precision = _precision_of(deployed.get(tensor.name, tensor.dtype))
        if precision is not None:
            return precision
    return ""
