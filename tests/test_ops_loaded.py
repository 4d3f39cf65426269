"""Cost functions on Nodes built by the real loader (``gate.model.load_model``).

Models are built in code with ``onnx.helper`` and saved to a temporary folder:
control flow whose bodies read an outer-scope initializer, a recurrent layer and
an attention block with a symbolic sequence length. Checks that subgraphs,
``const_values`` and ``param_inputs`` arrive in the form the cost functions use.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from gate.model.loader import load_model
from gate.ops import Unmodelled, cost_function_for

F = TensorProto.FLOAT


def _save(tmp_path: Path, nodes, inputs, outputs, inits, name="m") -> Path:
    g = helper.make_graph(nodes, name, inputs, outputs, inits)
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 21)])
    onnx.checker.check_model(model, full_check=True)
    path = tmp_path / f"{name}.onnx"
    onnx.save(model, path)
    return path


def _fc_body() -> onnx.GraphProto:
    """Loop body: state = Relu(state @ W) with W an outer-scope initializer (8 x 8)."""
    nodes = [helper.make_node("Identity", ["cond_in"], ["cond_out"]),
             helper.make_node("MatMul", ["state", "W"], ["mm"], name="body_fc"),
             helper.make_node("Relu", ["mm"], ["state_out"])]
    return helper.make_graph(
        nodes, "body",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("state", F, [1, 8])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("state_out", F, [1, 8])])


def _layer(path: Path, op_type: str, dims=None):
    model = load_model(path, dims)
    return next(n for n in model.graph.nodes if n.op_type == op_type)


def test_loop_with_constant_trip_count(tmp_path):
    inits = [numpy_helper.from_array(np.array(6, np.int64), "M"),
             numpy_helper.from_array(np.array(True), "cond"),
             numpy_helper.from_array(np.zeros((8, 8), np.float32), "W")]
    loop = helper.make_node("Loop", ["M", "cond", "x"], ["y"], body=_fc_body(), name="loop")
    path = _save(tmp_path, [loop], [helper.make_tensor_value_info("x", F, [1, 8])],
                 [helper.make_tensor_value_info("y", F, [1, 8])], inits)
    node = _layer(path, "Loop")
    work = cost_function_for("", "Loop")(node)
    assert work.macs == 6 * 64 and work.vector_ops == 6 * 8
    assert work.gemms[0].weights_are_params and work.gemms[0].sequential == 6
    assert "upper bound" in work.note


def test_if_with_constant_condition_and_lstm(tmp_path):
    def branch(op: str) -> onnx.GraphProto:
        return helper.make_graph([helper.make_node(op, ["x"], ["out"])], op,
                                 [], [helper.make_tensor_value_info("out", F, [1, 8])])
    hidden, size = 4, 8
    inits = [numpy_helper.from_array(np.array(False), "c"),
             numpy_helper.from_array(np.zeros((1, 4 * hidden, size), np.float32), "W"),
             numpy_helper.from_array(np.zeros((1, 4 * hidden, hidden), np.float32), "R")]
    nodes = [helper.make_node("If", ["c"], ["z"], then_branch=branch("Sigmoid"),
                              else_branch=branch("Relu")),
             helper.make_node("Reshape", ["z", "shape"], ["seq"]),
             helper.make_node("LSTM", ["seq", "W", "R"], ["Y"], hidden_size=hidden)]
    inits.append(numpy_helper.from_array(np.array([1, 1, 8], np.int64), "shape"))
    path = _save(tmp_path, nodes, [helper.make_tensor_value_info("x", F, [1, 8])],
                 [helper.make_tensor_value_info("Y", F, [1, 1, 1, hidden])], inits)
    if_work = cost_function_for("", "If")(_layer(path, "If"))
    assert if_work.vector_ops == 8 and "else_branch" in if_work.note  # Relu: 1 op x 8
    lstm = _layer(path, "LSTM")
    work = cost_function_for("", "LSTM")(lstm)
    assert work.macs == 1 * 1 * 4 * hidden * (size + hidden)
    assert lstm.is_param(1) and lstm.is_param(2)


def test_attention_sequence_length_binding(tmp_path):
    nodes = [helper.make_node("Transpose", ["k"], ["kt"], perm=[0, 1, 3, 2]),
             helper.make_node("MatMul", ["q", "kt"], ["scores"], name="qk")]
    ins = [helper.make_tensor_value_info(n, F, [1, 2, "seq", 16]) for n in ("q", "k")]
    path = _save(tmp_path, nodes, ins, [helper.make_tensor_value_info("scores", F, [1, 2, "seq", "seq"])], [])
    with pytest.raises(Unmodelled, match="--dim seq=N"):
        cost_function_for("", "MatMul")(_layer(path, "MatMul"))
    work = cost_function_for("", "MatMul")(_layer(path, "MatMul", {"seq": 10}))
    (gemm,) = work.gemms
    assert (gemm.m, gemm.k, gemm.n, gemm.count, gemm.weights_are_params) == (10, 16, 10, 2, False)


def test_scan_trip_count_from_scan_axis(tmp_path):
    body = helper.make_graph(
        [helper.make_node("Add", ["s", "x_t"], ["s_out"])], "scan_body",
        [helper.make_tensor_value_info("s", F, [1, 8]), helper.make_tensor_value_info("x_t", F, [8])],
        [helper.make_tensor_value_info("s_out", F, [1, 8])])
    scan = helper.make_node("Scan", ["s0", "xs"], ["s_final"], body=body, num_scan_inputs=1)
    ins = [helper.make_tensor_value_info("s0", F, [1, 8]),
           helper.make_tensor_value_info("xs", F, [5, 8])]
    path = _save(tmp_path, [scan], ins, [helper.make_tensor_value_info("s_final", F, [1, 8])], [])
    work = cost_function_for("", "Scan")(_layer(path, "Scan"))
    assert work.flops == work.vector_ops == 5 * 8
