"""Contrib (com.microsoft) ops and standard RotaryEmbedding against their decompositions.

Each test builds the fused op and its decomposition into standard ONNX ops with
``onnx.helper``, loads both through the real loader (so onnx shape inference must
size the contrib op's outputs through our rules), profiles them and requires equal
MACs, FLOPs, parameters and parameter bytes, and a fused layer that reads and writes
exactly the decomposition's boundary tensors. Where ``onnx.reference`` can run the
decomposition, its MACs are also checked by an execution trace (``traced_macs``).

Sources: the ONNX operator specification (the standard ops of each decomposition;
``onnx.reference`` runs RotaryEmbedding, RMSNormalization, Attention); for the
contrib ops, the public contrib-op documentation of the runtime that defines them
(ContribOperators.md: input orders and semantics). Facts recalled from memory are
marked in the modules (gate/ops/contrib_*.py) and beside the tests here.
"""

from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from gate.errors import InputError
from gate.model.loader import load_model
from gate.ops import cost_function_for
from gate.ops.contrib_attention import ROTARY_OPS_PER_ROTATED_ELEMENT
from gate.ops.normalization import SOFTMAX_OPS_PER_ELEMENT
from gate.profile import profile_model
from tests.opkit import (
    assert_fused_equals_decomposition,
    graph_model,
    int_constant,
    node,
    profile_totals,
    scalar_nodes,
    traced_macs,
)

MS = "com.microsoft"
U8, I8, F = TensorProto.UINT8, TensorProto.INT8, TensorProto.FLOAT
RNG = np.random.default_rng(7)


def _w(*shape):
    return RNG.standard_normal(shape).astype(np.float32)


def _check(tmp_path, fused, parts, feeds=None):
    fused_totals = profile_totals(fused, tmp_path, "fused")
    parts_totals = profile_totals(parts, tmp_path, "parts")
    assert_fused_equals_decomposition(fused_totals, parts_totals)
    assert fused_totals["macs"] > 0 or fused_totals["flops"] > 0
    if feeds is not None:  # execution trace of the decomposition
        assert fused_totals["macs"] == traced_macs(parts, feeds)
    return fused_totals


def _ms(op, inputs, outputs, **attrs):
    return helper.make_node(op, inputs, outputs, domain=MS, **attrs)


# --- fused matrix ops -------------------------------------------------------

@pytest.mark.parametrize("activation", ["Relu", "LeakyRelu", "HardSigmoid"])
def test_fused_conv_is_conv_add_activation(tmp_path, activation):
    inits = {"W": _w(8, 3, 3, 3), "B": _w(8)}
    shapes = {"X": (1, 3, 10, 10), "Z": (1, 8, 5, 5)}
    conv = {"pads": [1, 1, 1, 1], "strides": [2, 2]}
    fused = graph_model([_ms("FusedConv", ["X", "W", "B", "Z"], ["Y"], activation=activation,
                             **conv)], shapes, ["Y"], inits, contrib=True)
    parts = graph_model([helper.make_node("Conv", ["X", "W", "B"], ["c"], **conv),
                         helper.make_node("Add", ["c", "Z"], ["s"]),
                         helper.make_node(activation, ["s"], ["Y"])], shapes, ["Y"], inits)
    feeds = {name: _w(*shape) for name, shape in shapes.items()}
    _check(tmp_path, fused, parts, feeds)


def test_fused_gemm_is_gemm_activation(tmp_path):
    inits = {"W": _w(6, 16), "C": _w(6)}
    fused = graph_model([_ms("FusedGemm", ["A", "W", "C"], ["Y"], transB=1, alpha=0.5,
                             activation="Relu")], {"A": (4, 16)}, ["Y"], inits, contrib=True)
    parts = graph_model([helper.make_node("Gemm", ["A", "W", "C"], ["g"], transB=1, alpha=0.5),
                         helper.make_node("Relu", ["g"], ["Y"])], {"A": (4, 16)}, ["Y"], inits)
    _check(tmp_path, fused, parts, {"A": _w(4, 16)})


def test_fused_matmul_is_transpose_matmul_scale(tmp_path):
    shapes = {"A": (2, 3, 7, 5), "B": (3, 6, 7)}  # A transposed, B transposed, broadcast batch
    fused = graph_model([_ms("FusedMatMul", ["A", "B"], ["Y"], transA=1, transB=1, alpha=0.25)],
                        shapes, ["Y"], contrib=True)
    parts = graph_model([helper.make_node("Transpose", ["A"], ["at"], perm=[0, 1, 3, 2]),
                         helper.make_node("Transpose", ["B"], ["bt"], perm=[0, 2, 1]),
                         helper.make_node("MatMul", ["at", "bt"], ["m"]),
                         *scalar_nodes("alpha", 0.25),
                         helper.make_node("Mul", ["m", "alpha"], ["Y"])], shapes, ["Y"])
    feeds = {name: _w(*shape) for name, shape in shapes.items()}
    totals = _check(tmp_path, fused, parts, feeds)
    assert totals["macs"] == 2 * 3 * 5 * 7 * 6


def test_matmul_nbits_is_blockwise_dequantize_matmul(tmp_path):
    # K=64, N=32, 4 bits, blocks of 32: packed weight [N, K/32, 32*4/8] = [32, 2, 16] uint8
    # (layout from memory). The decomposition holds the same weight as INT4 [K, N].
    k, n, block = 64, 32, 32
    fused_inits = {"Bq": np.zeros((n, k // block, block // 2), np.uint8),
                   "scales": np.ones(n * (k // block), np.float32), "bias": _w(n)}
    fused = graph_model([_ms("MatMulNBits", ["A", "Bq", "scales", "", "", "bias"], ["Y"],
                             K=k, N=n, bits=4, block_size=block)], {"A": (2, 5, k)}, ["Y"],
                        fused_inits, contrib=True)
    weight = helper.make_tensor("Wq", TensorProto.INT4, [k, n], np.zeros(k * n, np.int8))
    parts = graph_model([helper.make_node("DequantizeLinear", ["Wq", "wscale"], ["W"], axis=0,
                                          block_size=block),
                         helper.make_node("MatMul", ["A", "W"], ["m"]),
                         helper.make_node("Add", ["m", "bias"], ["Y"])], {"A": (2, 5, k)}, ["Y"],
                        {"wscale": np.ones((k // block, n), np.float32), "bias": _w(n)})
    parts.graph.initializer.append(weight)
    totals = _check(tmp_path, fused, parts)  # parameter count and bytes equal, not packed
    assert totals["macs"] == 2 * 5 * k * n
    # N x K logical weights at 4 bits (ContribOperators.md: B holds N x K bits-wide values),
    # plus the bias's N floats; scales are quantization metadata
    assert totals["params"] == k * n + n
    assert totals["param_bytes"] == k * n // 2 + 4 * n


@pytest.mark.parametrize("bits", [2, 4, 8])
def test_matmul_nbits_counts_logical_weights_at_its_bit_width(tmp_path, bits):
    """K=48 in blocks of 16 (3 blocks a row), N=8: N x K weights at ``bits`` bits each,
    whatever the packing; the negative control is a packed tensor of the wrong size,
    counted as stored (and the op unmodelled) rather than guessed."""
    k, n, block = 48, 8, 16
    packed = np.zeros((n, k // block, block * bits // 8), np.uint8)
    model = graph_model([_ms("MatMulNBits", ["A", "Bq", "scales"], ["Y"], K=k, N=n, bits=bits,
                             block_size=block)], {"A": (1, k)}, ["Y"],
                        {"Bq": packed, "scales": np.ones(n * (k // block), np.float32)},
                        contrib=True)
    totals = profile_totals(model, tmp_path, f"nbits{bits}")
    assert totals["params"] == n * k
    assert totals["param_bytes"] == n * k * bits // 8 == packed.nbytes
    assert totals["macs"] == k * n
    wrong = np.zeros((n, k // block, block * bits // 8 + 1), np.uint8)  # one byte too many
    model.graph.initializer[0].CopyFrom(onnx.numpy_helper.from_array(wrong, "Bq"))
    onnx.save(model, str(tmp_path / "wrong.onnx"))
    profile = profile_model(load_model(tmp_path / "wrong.onnx"))
    (layer,) = profile.layers
    assert not layer.modelled and "does not hold" in layer.unmodelled_reason
    assert profile.total_param_count == wrong.size  # as stored: no logical reading guessed


# --- fused elementwise and normalisation ------------------------------------

X_SHAPE = (2, 6, 16)


def _elementwise_pair(op, extra_inputs, decomposition, attrs=None, opset=21):
    shapes = {"X": X_SHAPE, **{name: shape for name, shape in extra_inputs}}
    names = ["X", *(name for name, _ in extra_inputs)]
    fused = graph_model([_ms(op, names, ["Y"], **(attrs or {}))], shapes, ["Y"], contrib=True,
                        opset=opset)
    parts = graph_model(decomposition, shapes, ["Y"], opset=opset)
    return fused, parts


@pytest.mark.parametrize("op,extra,decomposition,attrs", [
    ("Gelu", [], [helper.make_node("Gelu", ["X"], ["Y"])], None),
    ("BiasGelu", [("bias", (16,))], [helper.make_node("Add", ["X", "bias"], ["s"]),
                                     helper.make_node("Gelu", ["s"], ["Y"])], None),
    ("FastGelu", [("bias", (16,))], [helper.make_node("Add", ["X", "bias"], ["s"]),
                                     helper.make_node("Gelu", ["s"], ["Y"], approximate="tanh")],
     None),
    ("FastGelu", [], [helper.make_node("Gelu", ["X"], ["Y"], approximate="tanh")], None),
    # QuickGelu: x * sigmoid(alpha * x), alpha default 1.702 (from memory)
    ("QuickGelu", [], [*scalar_nodes("alpha", 1.702), helper.make_node("Mul", ["X", "alpha"], ["a"]),
                       helper.make_node("Sigmoid", ["a"], ["s"]),
                       helper.make_node("Mul", ["X", "s"], ["Y"])], None),
    ("BiasAdd", [("bias", (16,)), ("skip", X_SHAPE)],
     [helper.make_node("Add", ["X", "bias"], ["s"]), helper.make_node("Add", ["s", "skip"], ["Y"])],
     None),
])
def test_fused_elementwise_equals_decomposition(tmp_path, op, extra, decomposition, attrs):
    fused, parts = _elementwise_pair(op, extra, decomposition, attrs)
    _check(tmp_path, fused, parts)


@pytest.mark.parametrize("beta,bias", [(True, True), (False, False)])
def test_skip_layer_normalization(tmp_path, beta, bias):
    # Inputs (input, skip, gamma, beta, bias); outputs (output, mean, inv_std, sum).
    inits = {"gamma": _w(16), **({"beta": _w(16)} if beta else {}), **({"bias": _w(16)} if bias else {})}
    shapes = {"X": X_SHAPE, "skip": X_SHAPE}
    fused = graph_model([_ms("SkipLayerNormalization", ["X", "skip", "gamma", "beta" if beta else "",
                                                        "bias" if bias else ""],
                             ["Y", "", "", "sum"], epsilon=1e-5)], shapes, ["Y", "sum"], inits,
                        contrib=True)
    nodes = [helper.make_node("Add", ["X", "skip"], ["s0" if bias else "sum"])]
    if bias:
        nodes.append(helper.make_node("Add", ["s0", "bias"], ["sum"]))
    nodes.append(helper.make_node("LayerNormalization", ["sum", "gamma", "beta" if beta else ""],
                                  ["Y"], axis=-1))
    _check(tmp_path, fused, graph_model(nodes, shapes, ["Y", "sum"], inits))


def test_skip_simplified_layer_normalization(tmp_path):
    inits = {"gamma": _w(16), "bias": _w(16)}
    shapes = {"X": X_SHAPE, "skip": X_SHAPE}
    fused = graph_model([_ms("SkipSimplifiedLayerNormalization", ["X", "skip", "gamma", "bias"],
                             ["Y"])], shapes, ["Y"], inits, contrib=True, opset=23)
    parts = graph_model([helper.make_node("Add", ["X", "skip"], ["s0"]),
                         helper.make_node("Add", ["s0", "bias"], ["s"]),
                         helper.make_node("RMSNormalization", ["s", "gamma"], ["Y"])],
                        shapes, ["Y"], inits, opset=23)
    _check(tmp_path, fused, parts)


@pytest.mark.parametrize("domain", ["", MS])
def test_simplified_layer_normalization_is_rms_normalization(tmp_path, domain):
    # The runtime defining it registers it in the default ONNX domain (from memory).
    inits = {"gamma": _w(6, 16)}
    fused = graph_model([helper.make_node("SimplifiedLayerNormalization", ["X", "gamma"], ["Y"],
                                          domain=domain, axis=-2)], {"X": X_SHAPE}, ["Y"], inits,
                        contrib=True, opset=23)
    parts = graph_model([helper.make_node("RMSNormalization", ["X", "gamma"], ["Y"], axis=-2)],
                        {"X": X_SHAPE}, ["Y"], inits, opset=23)
    _check(tmp_path, fused, parts)


# --- QOperator ops: fused form against DequantizeLinear -> float op -> QuantizeLinear

def _q_inits(*names):
    inits = {}
    for name in names:
        inits[f"{name}_s"] = np.array(0.05, np.float32)
        inits[f"{name}_z"] = np.array(128, np.uint8)
    return inits


def _dq(name, out=None):
    return helper.make_node("DequantizeLinear", [name, f"{name}_s", f"{name}_z"], [out or f"{name}_f"])


def _q(src, name="Y"):
    return helper.make_node("QuantizeLinear", [src, f"{name}_s", f"{name}_z"], [name])


@pytest.mark.parametrize("op,float_op", [("QLinearAdd", "Add"), ("QLinearMul", "Mul")])
def test_qlinear_binary(tmp_path, op, float_op):
    shapes, dtypes = {"A": (1, 8, 4, 4), "B": (1, 8, 1, 1)}, {"A": U8, "B": U8}
    inits = _q_inits("A", "B", "Y")
    fused = graph_model([_ms(op, ["A", "A_s", "A_z", "B", "B_s", "B_z", "Y_s", "Y_z"], ["Y"])],
                        shapes, ["Y"], inits, contrib=True, dtypes=dtypes)
    parts = graph_model([_dq("A"), _dq("B"), helper.make_node(float_op, ["A_f", "B_f"], ["y"]),
                         _q("y")], shapes, ["Y"], inits, dtypes=dtypes)
    _check(tmp_path, fused, parts)


@pytest.mark.parametrize("op,float_node", [
    ("QLinearSigmoid", helper.make_node("Sigmoid", ["X_f"], ["y"])),
    ("QLinearLeakyRelu", helper.make_node("LeakyRelu", ["X_f"], ["y"], alpha=0.1)),
    ("QLinearSoftmax", helper.make_node("Softmax", ["X_f"], ["y"], axis=-1)),
])
def test_qlinear_unary(tmp_path, op, float_node):
    attrs = {"alpha": 0.1} if op == "QLinearLeakyRelu" else (
        {"axis": -1, "opset": 13} if op == "QLinearSoftmax" else {})
    shapes, dtypes, inits = {"X": (2, 3, 10)}, {"X": U8}, _q_inits("X", "Y")
    fused = graph_model([_ms(op, ["X", "X_s", "X_z", "Y_s", "Y_z"], ["Y"], **attrs)], shapes,
                        ["Y"], inits, contrib=True, dtypes=dtypes)
    parts = graph_model([_dq("X"), float_node, _q("y")], shapes, ["Y"], inits, dtypes=dtypes)
    _check(tmp_path, fused, parts)


def test_qlinear_concat(tmp_path):
    shapes, dtypes = {"A": (1, 3, 4, 4), "B": (1, 5, 4, 4)}, {"A": U8, "B": U8}
    inits = _q_inits("A", "B", "Y")
    fused = graph_model([_ms("QLinearConcat", ["Y_s", "Y_z", "A", "A_s", "A_z", "B", "B_s", "B_z"],
                             ["Y"], axis=1)], shapes, ["Y"], inits, contrib=True, dtypes=dtypes)
    parts = graph_model([_dq("A"), _dq("B"), helper.make_node("Concat", ["A_f", "B_f"], ["y"],
                                                              axis=1), _q("y")],
                        shapes, ["Y"], inits, dtypes=dtypes)
    _check(tmp_path, fused, parts)


@pytest.mark.parametrize("op,attrs", [
    ("GlobalAveragePool", {}),
    ("AveragePool", {"kernel_shape": [3, 3], "strides": [2, 2], "pads": [1, 1, 1, 1]}),
])
@pytest.mark.parametrize("channels_last", [0, 1])
def test_qlinear_pools(tmp_path, op, attrs, channels_last):
    x = (1, 9, 9, 8) if channels_last else (1, 8, 9, 9)
    shapes, dtypes, inits = {"X": x}, {"X": U8}, _q_inits("X", "Y")
    fused = graph_model([_ms(f"QLinear{op}", ["X", "X_s", "X_z", "Y_s", "Y_z"], ["Y"],
                             channels_last=channels_last, **attrs)], shapes, ["Y"], inits,
                        contrib=True, dtypes=dtypes)
    nodes = [_dq("X")]
    src = "X_f"
    if channels_last:  # the channels_last attribute is from memory
        nodes.append(helper.make_node("Transpose", [src], ["nchw"], perm=[0, 3, 1, 2]))
        src = "nchw"
    nodes.append(helper.make_node(op, [src], ["p"], **attrs))
    src = "p"
    if channels_last:
        nodes.append(helper.make_node("Transpose", [src], ["nhwc"], perm=[0, 2, 3, 1]))
        src = "nhwc"
    nodes.append(_q(src))
    _check(tmp_path, fused, graph_model(nodes, shapes, ["Y"], inits, dtypes=dtypes))


@pytest.mark.parametrize("trans_b", [0, 1])
def test_qgemm_is_qlinear_matmul(tmp_path, trans_b):
    k, n = 16, 6
    inits = {**_q_inits("A", "Y"), "W_s": np.array(0.02, np.float32), "W_z": np.array(0, np.int8)}
    w_fused = np.zeros((n, k) if trans_b else (k, n), np.int8)
    shapes, dtypes = {"A": (4, k)}, {"A": U8}
    fused = graph_model([_ms("QGemm", ["A", "A_s", "A_z", "W", "W_s", "W_z", "", "Y_s", "Y_z"], ["Y"],
                             transB=trans_b)], shapes, ["Y"], {**inits, "W": w_fused}, contrib=True,
                        dtypes=dtypes)
    parts = graph_model([helper.make_node("QLinearMatMul", ["A", "A_s", "A_z", "W", "W_s", "W_z",
                                                            "Y_s", "Y_z"], ["Y"])],
                        shapes, ["Y"], {**inits, "W": np.zeros((k, n), np.int8)}, dtypes=dtypes)
    _check(tmp_path, fused, parts)
    loaded = load_model(tmp_path / "fused.onnx")
    assert loaded.graph.nodes[0].outputs[0].dtype == "UINT8"  # the y_zero_point's type


# --- attention ---------------------------------------------------------------

def _split3(name, sizes, axis=-1):
    return [int_constant(f"{name}_sizes", sizes),
            helper.make_node("Split", [name, f"{name}_sizes"], [f"{name}_q", f"{name}_k",
                                                                  f"{name}_v"], axis=axis)]


@pytest.mark.parametrize("past", [0, 3])
def test_ms_attention_is_projection_plus_onnx_attention(tmp_path, past):
    b, s, hidden, heads = 2, 5, 16, 4
    inits = {"W": _w(hidden, 3 * hidden), "bias": _w(3 * hidden)}
    shapes = {"X": (b, s, hidden)}
    outputs = ["Y"]
    if past:
        shapes["past"] = (2, b, heads, past, hidden // heads)
        outputs.append("present")
    fused = graph_model([_ms("Attention", ["X", "W", "bias", "", "past" if past else ""], outputs,
                             num_heads=heads, unidirectional=1)], shapes, outputs, inits,
                        contrib=True, opset=23)
    nodes = [helper.make_node("MatMul", ["X", "W"], ["p"]), helper.make_node("Add", ["p", "bias"], ["qkv"]),
             *_split3("qkv", [hidden] * 3)]
    attention_inputs = ["qkv_q", "qkv_k", "qkv_v"]
    attention_outputs = ["Y"]
    if past:
        nodes += [int_constant("two", [1, 1]), int_constant("zero", [0]),
                  helper.make_node("Split", ["past", "two"], ["pk5", "pv5"], axis=0),
                  helper.make_node("Squeeze", ["pk5", "zero"], ["pk"]),
                  helper.make_node("Squeeze", ["pv5", "zero"], ["pv"])]
        attention_inputs += ["", "pk", "pv"]
        attention_outputs += ["kk", "vv"]
    nodes.append(helper.make_node("Attention", attention_inputs, attention_outputs, q_num_heads=heads,
                                  kv_num_heads=heads, is_causal=1))
    if past:  # present = the two caches stacked, as the fused op writes it
        nodes += [helper.make_node("Unsqueeze", ["kk", "zero"], ["kk5"]),
                  helper.make_node("Unsqueeze", ["vv", "zero"], ["vv5"]),
                  helper.make_node("Concat", ["kk5", "vv5"], ["present"], axis=0)]
    parts = graph_model(nodes, shapes, outputs, inits, opset=23)
    feeds = {name: _w(*shape) for name, shape in shapes.items()}
    _check(tmp_path, fused, parts, feeds)


@pytest.mark.parametrize("past", [0, 2])
def test_multi_head_attention_is_bias_plus_onnx_attention(tmp_path, past):
    b, s, kv, heads, d, dv = 2, 5, 7, 4, 16, 24
    inits = {"bias": _w(2 * d + dv)}
    shapes = {"Q": (b, s, d), "K": (b, kv, d), "V": (b, kv, dv)}
    outputs = ["Y"]
    if past:
        shapes.update(past_key=(b, heads, past, d // heads), past_value=(b, heads, past, dv // heads))
        outputs += ["present_key", "present_value"]
    past_inputs = ["past_key", "past_value"] if past else []
    fused = graph_model([_ms("MultiHeadAttention", ["Q", "K", "V", "bias", "", "", *past_inputs],
                             outputs, num_heads=heads)], shapes, outputs, inits, contrib=True,
                        opset=23)
    nodes = [*_split3("bias", [d, d, dv], axis=0),
             helper.make_node("Add", ["Q", "bias_q"], ["q"]), helper.make_node("Add", ["K", "bias_k"], ["k"]),
             helper.make_node("Add", ["V", "bias_v"], ["v"]),
             helper.make_node("Attention", ["q", "k", "v", "", *past_inputs], outputs,
                              q_num_heads=heads, kv_num_heads=heads)]
    parts = graph_model(nodes, shapes, outputs, inits, opset=23)
    feeds = {name: _w(*shape) for name, shape in shapes.items()}
    _check(tmp_path, fused, parts, feeds)


def test_group_query_attention_is_causal_grouped_onnx_attention(tmp_path):
    b, s, past, heads, kv_heads, head = 1, 3, 5, 4, 2, 8
    shapes = {"Q": (b, s, heads * head), "K": (b, s, kv_heads * head), "V": (b, s, kv_heads * head),
              "past_key": (b, kv_heads, past, head), "past_value": (b, kv_heads, past, head),
              "seqlens_k": (b,), "total_len": ()}
    dtypes = {"seqlens_k": TensorProto.INT32, "total_len": TensorProto.INT32}
    outputs = ["Y", "present_key", "present_value"]
    fused = graph_model([_ms("GroupQueryAttention", ["Q", "K", "V", "past_key", "past_value",
                                                     "seqlens_k", "total_len"], outputs,
                             num_heads=heads, kv_num_heads=kv_heads)], shapes, outputs,
                        contrib=True, opset=23, dtypes=dtypes)
    # The decomposition ignores the sequence lengths (the padding-free case) but keeps them
    # as graph inputs so both graphs have the same boundary.
    parts = graph_model([helper.make_node("Attention", ["Q", "K", "V", "", "past_key", "past_value"],
                                          outputs, q_num_heads=heads, kv_num_heads=kv_heads,
                                          is_causal=1)], shapes, outputs, opset=23, dtypes=dtypes)
    _check(tmp_path, fused, parts)


def test_group_query_attention_rotary_adds_the_rotary_embedding_of_q_and_k():
    b, s, heads, kv_heads, head = 1, 3, 4, 2, 8
    base = {"num_heads": heads, "kv_num_heads": kv_heads}
    inputs = [(b, s, heads * head), (b, s, kv_heads * head), (b, s, kv_heads * head),
              None, None, (b,), (), (16, head // 2), (16, head // 2)]
    plain = node("GroupQueryAttention", inputs, [(b, s, heads * head)], base)
    rotary = node("GroupQueryAttention", inputs, [(b, s, heads * head)], {**base, "do_rotary": 1})
    work = cost_function_for(MS, "GroupQueryAttention")
    rotated = b * s * (heads + kv_heads) * head
    assert work(rotary).flops - work(plain).flops == ROTARY_OPS_PER_ROTATED_ELEMENT * rotated


def _gqa_pair(window: int):
    """GroupQueryAttention with a sliding window and the ONNX Attention (opset 25) that
    masks the same scores: causal plus ``left_window_size``."""
    b, s, past, heads, kv_heads, head = 1, 3, 5, 4, 2, 8
    shapes = {"Q": (b, s, heads * head), "K": (b, s, kv_heads * head),
              "V": (b, s, kv_heads * head), "past_key": (b, kv_heads, past, head),
              "past_value": (b, kv_heads, past, head), "seqlens_k": (b,), "total_len": ()}
    dtypes = {"seqlens_k": TensorProto.INT32, "total_len": TensorProto.INT32}
    outputs = ["Y", "present_key", "present_value"]
    fused = graph_model([_ms("GroupQueryAttention", ["Q", "K", "V", "past_key", "past_value",
                                                     "seqlens_k", "total_len"], outputs,
                             num_heads=heads, kv_num_heads=kv_heads, local_window_size=window)],
                        shapes, outputs, contrib=True, opset=25, dtypes=dtypes)
    parts = graph_model([helper.make_node("Attention", ["Q", "K", "V", "", "past_key",
                                                        "past_value"], outputs,
                                          q_num_heads=heads, kv_num_heads=kv_heads, is_causal=1,
                                          left_window_size=window)],
                        shapes, outputs, opset=25, dtypes=dtypes)
    return fused, parts


def test_group_query_attention_sliding_window_is_windowed_onnx_attention(tmp_path):
    # Source: ONNX Attention (opset 25) left_window_size; the window masks scores that a
    # plain kernel still computes, so both count every score (an upper bound).
    fused, parts = _gqa_pair(window=2)
    _check(tmp_path, fused, parts)


def _gqa_node(**attrs):
    b, s, heads, kv_heads, head = 1, 3, 4, 2, 8
    inputs = [(b, s, heads * head), (b, s, kv_heads * head), (b, s, kv_heads * head),
              None, None, (b,), (), (16, head // 2), (16, head // 2)]
    return node("GroupQueryAttention", inputs, [(b, s, heads * head)],
                {"num_heads": heads, "kv_num_heads": kv_heads, **attrs})


def test_group_query_attention_smooth_softmax_adds_one_logit_per_row():
    """The zero logit (from memory of the contrib-op documentation) is one more softmax
    element per query row and head: b * s * heads rows of Softmax over kv + 1 elements."""
    work = cost_function_for(MS, "GroupQueryAttention")
    plain, smooth = work(_gqa_node()), work(_gqa_node(smooth_softmax=1))
    assert smooth.macs == plain.macs
    assert smooth.flops - plain.flops == SOFTMAX_OPS_PER_ELEMENT * 1 * 3 * 4


def _ms_attention_node(past: int = 0, **attrs):
    b, s, hidden, heads = 2, 3, 16, 4
    inputs = [(b, s, hidden), (hidden, 3 * hidden), (3 * hidden,), None,
              (2, b, heads, past, hidden // heads) if past else None]
    total = past if attrs.get("past_present_share_buffer") else past + s
    outputs = [(b, s, hidden), (2, b, heads, total, hidden // heads)]
    return node("Attention", inputs, outputs, {"num_heads": heads, **attrs}, params=(1, 2))


def test_ms_attention_do_rotary_adds_the_rotary_embedding_of_q_and_k():
    work = cost_function_for(MS, "Attention")
    plain, rotary = work(_ms_attention_node()), work(_ms_attention_node(do_rotary=1))
    assert rotary.macs == plain.macs
    # RotaryEmbedding (ONNX spec: 2 multiplies + 1 add per rotated element) of Q and K over
    # the whole head (rotary_embedding_dim defaults to the head size: from memory)
    assert rotary.flops - plain.flops == ROTARY_OPS_PER_ROTATED_ELEMENT * 2 * 3 * (4 + 4) * 4
    partial = work(_ms_attention_node(do_rotary=1, rotary_embedding_dim=2))
    assert partial.flops - plain.flops == ROTARY_OPS_PER_ROTATED_ELEMENT * 2 * 3 * (4 + 4) * 2


def test_ms_attention_shared_buffer_attends_over_the_whole_buffer():
    """A shared cache buffer of 8 positions is attended in full (its filled length is a
    run-time input: an upper bound), like a separate past of 8 - 3 = 5 plus 3 new tokens;
    only the new tokens are written into it."""
    work = cost_function_for(MS, "Attention")
    shared = work(_ms_attention_node(past=8, past_present_share_buffer=1))
    separate = work(_ms_attention_node(past=5))
    assert shared.macs == separate.macs and shared.flops == separate.flops
    new_tokens = 2 * 3 * 4 * (4 + 4)  # K and V of the new tokens, every head
    whole_present = 2 * 2 * 4 * 8 * 4  # a separate present is written in full: [2, b, n, 8, h]
    assert shared.vector_ops - separate.vector_ops == new_tokens - whole_present


# --- rotary embedding ----------------------------------------------------------

def _rotary_decomposition(b, n, s, h):
    half = h // 2
    nodes = [int_constant("one", [1]), int_constant("zero", [0]), int_constant("half", [half]),
             int_constant("full", [h]), int_constant("last", [3]),
             helper.make_node("Gather", ["cos_cache", "pos"], ["c3"]),
             helper.make_node("Gather", ["sin_cache", "pos"], ["s3"]),
             helper.make_node("Unsqueeze", ["c3", "one"], ["c"]),
             helper.make_node("Unsqueeze", ["s3", "one"], ["sn"]),
             helper.make_node("Slice", ["X", "zero", "half", "last"], ["x1"]),
             helper.make_node("Slice", ["X", "half", "full", "last"], ["x2"])]
    for out, (a, b_, op) in (("real", ("x1", "x2", "Sub")), ("imag", ("x2", "x1", "Add"))):
        nodes += [helper.make_node("Mul", [a, "c"], [f"{out}_c"]),
                  helper.make_node("Mul", [b_, "sn"], [f"{out}_s"]),
                  helper.make_node(op, [f"{out}_c", f"{out}_s"], [out])]
    nodes.append(helper.make_node("Concat", ["real", "imag"], ["Y"], axis=3))
    return nodes


def test_rotary_embedding_equals_its_decomposition(tmp_path):
    b, n, s, h, positions = 2, 3, 5, 8, 16
    shapes = {"X": (b, n, s, h), "cos_cache": (positions, h // 2),
              "sin_cache": (positions, h // 2), "pos": (b, s)}
    dtypes = {"pos": TensorProto.INT64}
    standard = graph_model([helper.make_node("RotaryEmbedding", ["X", "cos_cache", "sin_cache", "pos"],
                                             ["Y"])], shapes, ["Y"], opset=23, dtypes=dtypes)
    contrib = graph_model([_ms("RotaryEmbedding", ["X", "pos", "cos_cache", "sin_cache"], ["Y"])],
                          shapes, ["Y"], opset=23, contrib=True, dtypes=dtypes)
    parts = graph_model(_rotary_decomposition(b, n, s, h), shapes, ["Y"], opset=23, dtypes=dtypes)
    feeds = {"X": _w(b, n, s, h), "cos_cache": _w(positions, h // 2),
             "sin_cache": _w(positions, h // 2), "pos": RNG.integers(0, positions, (b, s))}
    # Source: onnx.reference implements the ONNX RotaryEmbedding spec; the decomposition agrees.
    (want,) = ReferenceEvaluator(standard).run(None, feeds)
    (have,) = ReferenceEvaluator(parts).run(None, feeds)
    np.testing.assert_allclose(have, want, rtol=1e-5, atol=1e-6)
    totals = _check(tmp_path, standard, parts)
    assert totals["flops"] == ROTARY_OPS_PER_ROTATED_ELEMENT * b * n * s * h
    _check(tmp_path, contrib, parts)


def test_partial_rotary_copies_the_rest_of_each_head():
    n = node("RotaryEmbedding", [(1, 6, 4 * 16), None, (32, 4), (32, 4)], [(1, 6, 64)],
             {"num_heads": 4, "rotary_embedding_dim": 8})
    work = cost_function_for(MS, "RotaryEmbedding")(n)
    assert work.flops == ROTARY_OPS_PER_ROTATED_ELEMENT * 6 * 4 * 8
    assert work.vector_ops == work.flops + 6 * 4 * 8  # the other 8 of each 16 are copied


# --- shape inference --------------------------------------------------------------

def test_contrib_outputs_and_everything_downstream_are_sized(tmp_path):
    # Without our rules onnx leaves a contrib op's outputs, and all that follows, unsized.
    inits = {"W": _w(16, 48)}
    model = graph_model([_ms("Attention", ["X", "W"], ["a"], num_heads=4),
                         _ms("FastGelu", ["a"], ["g"]),
                         helper.make_node("MatMul", ["g", "W"], ["Y"])],
                        {"X": ("batch", 5, 16)}, ["Y"], inits, contrib=True)
    path = tmp_path / "m.onnx"
    onnx.save(model, str(path))
    loaded = load_model(path, {"batch": 2})
    assert [n.outputs[0].shape for n in loaded.graph.nodes] == [(2, 5, 16), (2, 5, 16), (2, 5, 48)]


def test_a_conflicting_declared_shape_is_treated_as_for_a_standard_op(tmp_path):
    # A declared value_info that contradicts the shape the inputs give: one error naming
    # the tensor (stale stored shapes, gate/model/stored_shapes.infer_checked), exactly as for a
    # standard op.
    def load(first):
        model = graph_model([first, helper.make_node("Relu", ["g"], ["Y"])], {"X": (2, 3)}, ["Y"],
                            contrib=True)
        model.graph.value_info.append(helper.make_tensor_value_info("g", F, [7, 7]))
        path = tmp_path / f"{first.op_type}.onnx"
        onnx.save(model, str(path))
        with pytest.raises(InputError) as info:
            load_model(path)
        return info.value.format_message().split(": ", 1)[1]

    assert load(_ms("FastGelu", ["X"], ["g"])) == load(helper.make_node("Relu", ["X"], ["g"]))


@pytest.mark.parametrize("segments,mask", [(True, True), (False, False)])
def test_embed_layer_normalization(tmp_path, segments, mask):
    # Inputs and outputs as in the public contrib-op documentation; without position_ids
    # the positions are 0..S-1 (a Slice of the position table in the decomposition).
    b, s, h = 2, 6, 16
    inits = {"word": _w(50, h), "pos": _w(10, h), "gamma": _w(h), "beta": _w(h),
             **({"seg": _w(2, h)} if segments else {})}
    shapes = {"ids": (b, s), **({"seg_ids": (b, s)} if segments else {}),
              **({"mask": (b, s)} if mask else {})}
    dtypes = dict.fromkeys(shapes, TensorProto.INT32)
    inputs = ["ids", "seg_ids" if segments else "", "word", "pos", "seg" if segments else "",
              "gamma", "beta", "mask" if mask else ""]
    fused = graph_model([_ms("EmbedLayerNormalization", inputs, ["Y", "mask_index"])], shapes,
                        ["Y", "mask_index"], inits, contrib=True, dtypes=dtypes)
    nodes = [int_constant("start", [0]), int_constant("end", [s]), int_constant("axis", [0]),
             helper.make_node("Gather", ["word", "ids"], ["w"]),
             helper.make_node("Slice", ["pos", "start", "end", "axis"], ["p"]),
             helper.make_node("Add", ["w", "p"], ["e" if not segments else "wp"])]
    if segments:
        nodes += [helper.make_node("Gather", ["seg", "seg_ids"], ["sg"]),
                  helper.make_node("Add", ["wp", "sg"], ["e"])]
    nodes.append(helper.make_node("LayerNormalization", ["e", "gamma", "beta"], ["Y"], axis=-1))
    if mask:
        nodes += [int_constant("row", [1]),
                  helper.make_node("ReduceSum", ["mask", "row"], ["mask_index"], keepdims=0)]
    else:
        nodes += [int_constant("batch", [b]),
                  helper.make_node("ConstantOfShape", ["batch"], ["mask_index"],
                                   value=helper.make_tensor("zero", TensorProto.INT32, [1], [0]))]
    parts = graph_model(nodes, shapes, ["Y", "mask_index"], inits, dtypes=dtypes)
    _check(tmp_path, fused, parts)


@pytest.mark.parametrize("zero_point", [0, 3])
def test_dynamic_quantize_matmul(tmp_path, zero_point):
    # (A, B, b_scale, b_zero_point, bias): the pattern DynamicQuantizeLinear -> MatMulInteger
    # -> Cast -> Mul(scales) -> Mul -> Add that the runtime's optimizer fuses into it
    # (public contrib-op documentation for the input order).
    k, n = 12, 5
    inits = {"B": RNG.integers(-8, 8, (k, n)).astype(np.int8), "b_scale": np.full(n, 0.1, np.float32),
             "b_zp": np.full(n, zero_point, np.int8), "bias": _w(n)}
    shapes = {"A": (3, 4, k)}
    fused = graph_model([_ms("DynamicQuantizeMatMul", ["A", "B", "b_scale", "b_zp", "bias"], ["Y"])],
                        shapes, ["Y"], inits, contrib=True)
    parts = graph_model([helper.make_node("DynamicQuantizeLinear", ["A"], ["Aq", "a_scale", "a_zp"]),
                         helper.make_node("MatMulInteger", ["Aq", "B", "a_zp", "b_zp"], ["acc"]),
                         helper.make_node("Cast", ["acc"], ["accf"], to=TensorProto.FLOAT),
                         helper.make_node("Mul", ["a_scale", "b_scale"], ["scale"]),
                         helper.make_node("Mul", ["accf", "scale"], ["y"]),
                         helper.make_node("Add", ["y", "bias"], ["Y"])], shapes, ["Y"], inits)
    totals = _check(tmp_path, fused, parts, {"A": _w(3, 4, k)})
    assert totals["macs"] == 3 * 4 * k * n
