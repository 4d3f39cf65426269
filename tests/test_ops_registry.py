"""Coverage of the op registry: at least 60 op types, every one a real ONNX op.

External check: ``onnx.defs.has`` (the ONNX operator specification shipped
with the onnx package) knows every registered (domain, op_type).
"""

from __future__ import annotations

import onnx.defs

from gate.ops import modelled_op_types

REQUIRED = (
    "Conv ConvTranspose Gemm MatMul Einsum LSTM GRU RNN BatchNormalization LayerNormalization "
    "InstanceNormalization Softmax MaxPool AveragePool GlobalAveragePool GlobalMaxPool ReduceSum "
    "ReduceMean ReduceMax Resize Reshape Transpose Concat Split Slice Gather Pad Expand Flatten "
    "Squeeze Unsqueeze QLinearConv QLinearMatMul ConvInteger MatMulInteger QuantizeLinear "
    "DequantizeLinear Constant If Loop Scan Add Sub Mul Div Pow Max Min Sum Mean Relu LeakyRelu "
    "PRelu Sigmoid Tanh HardSigmoid HardSwish Gelu Erf Exp Log Sqrt Reciprocal Neg Abs Clip Elu "
    "Selu Softplus Softsign Sign Floor Ceil Round Where Equal Less Greater Not And Or Cast"
).split()


def test_at_least_sixty_op_types():
    assert len(modelled_op_types()) >= 60


def test_every_registered_op_is_in_the_onnx_spec():
    unknown = [(d, op) for d, op in modelled_op_types() if not onnx.defs.has(op, d)]
    assert unknown == []


def test_every_op_the_issue_lists_is_modelled():
    modelled = {op for domain, op in modelled_op_types() if domain == ""}
    assert sorted(set(REQUIRED) - modelled) == []
