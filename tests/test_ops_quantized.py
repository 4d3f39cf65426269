"""Quantized op cost functions: float-equivalent MACs plus zero-point and requantize work.

External checks: one-node models with INT8/UINT8 dtypes accepted by strict
``onnx.shape_inference``; MACs must equal the float Conv/MatMul of the same
shapes (the ONNX spec defines these ops as the float op on dequantized values).
"""

from __future__ import annotations

import numpy as np
from onnx import TensorProto

from gate.ops import cost_function_for
from gate.ops import quantized as q
from tests.opkit import inferred_node

U8, I8, F = TensorProto.UINT8, TensorProto.INT8, TensorProto.FLOAT
X, W = (1, 8, 10, 10), (16, 8, 3, 3)


def _float_macs(op, shapes):
    return cost_function_for("", op)(inferred_node(op, shapes, params=[1])).macs


def _scalar(value, dtype):
    return np.array(value, dtype=dtype)


def _qlinear_conv(weight_zero_point: int):
    consts = {1: _scalar(0.1, np.float32), 2: _scalar(128, np.uint8), 4: _scalar(0.2, np.float32),
              5: _scalar(weight_zero_point, np.int8), 6: _scalar(0.3, np.float32),
              7: _scalar(128, np.uint8)}
    n = inferred_node("QLinearConv", [X, (), (), W, (), (), (), ()], constants=consts,
                      dtypes={0: U8, 3: I8}, params=[3])
    return cost_function_for("", "QLinearConv")(n)


def test_qlinear_conv_matches_float_conv_plus_requantize():
    work = _qlinear_conv(weight_zero_point=0)
    outputs = 16 * 8 * 8
    assert work.macs == _float_macs("Conv", [X, W])
    # Symmetric weights (zero point 0): the activation zero point's term is a per-channel
    # constant folded into the bias, so only the requantization is left.
    assert work.vector_ops == q.REQUANTIZE_OPS_PER_OUTPUT * outputs
    assert work.flops == 2 * work.macs + work.vector_ops


def test_nonzero_weight_zero_point_needs_the_input_sums():
    # sum_k (x - zx)(w - zw) has the term zw * sum_k x: one add per input element.
    work = _qlinear_conv(weight_zero_point=3)
    assert work.vector_ops == 800 + q.REQUANTIZE_OPS_PER_OUTPUT * 16 * 8 * 8


def test_integer_ops_have_no_requantize():
    conv = inferred_node("ConvInteger", [X, W], dtypes={0: U8, 1: I8})
    assert cost_function_for("", "ConvInteger")(conv).vector_ops == 0
    mm = inferred_node("MatMulInteger", [(4, 32), (32, 8), ()], dtypes={0: U8, 1: I8, 2: U8})
    work = cost_function_for("", "MatMulInteger")(mm)
    # B is an activation and A's zero point is given (value unknown): B's column sums.
    assert work.macs == 4 * 32 * 8 and work.vector_ops == 32 * 8


def test_qlinear_matmul():
    consts = {1: _scalar(0.1, np.float32), 2: _scalar(0, np.uint8), 4: _scalar(0.1, np.float32),
              5: _scalar(0, np.int8), 6: _scalar(0.1, np.float32), 7: _scalar(0, np.uint8)}
    n = inferred_node("QLinearMatMul", [(2, 4, 32), (), (), (32, 8), (), (), (), ()],
                      constants=consts, dtypes={0: U8, 3: I8}, params=[3])
    work = cost_function_for("", "QLinearMatMul")(n)
    assert work.macs == _float_macs("MatMul", [(2, 4, 32), (32, 8)])
    assert work.gemms[0].weights_are_params and work.gemms[0].m == 8


def test_quantize_dequantize():
    quant = inferred_node("QuantizeLinear", [X, ()], constants={1: _scalar(0.1, np.float32)})
    assert cost_function_for("", "QuantizeLinear")(quant).flops == q.QUANTIZE_OPS_PER_ELEMENT * 800
    deq = inferred_node("DequantizeLinear", [X, ()], constants={1: _scalar(0.1, np.float32)},
                        dtypes={0: I8})
    assert cost_function_for("", "DequantizeLinear")(deq).flops == q.DEQUANTIZE_OPS_PER_ELEMENT * 800
    dyn = inferred_node("DynamicQuantizeLinear", [X], n_outputs=3)
    assert cost_function_for("", "DynamicQuantizeLinear")(dyn).flops == (
        q.DYNAMIC_QUANTIZE_OPS_PER_ELEMENT * 800 + q.DYNAMIC_QUANTIZE_OPS_PER_TENSOR)
