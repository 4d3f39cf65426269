"""The profiler walk: per-layer counts and bytes, totals, precision override and coverage."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from loadkit import chain, loop_model, model, save, small_cnn, vi, weight
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from gate.errors import InputError, InternalError
from gate.model.loader import load_model
from gate.ops import registry
from gate.ops.quantized import REQUANTIZE_OPS_PER_OUTPUT
from gate.profile import profile_model


def _profile(proto: onnx.ModelProto, folder: Path, precision: str | None = None, **dims: int):
    return profile_model(load_model(save(proto, folder / "m.onnx"), dims), precision)


def test_small_cnn_counts(tmp_path: Path) -> None:
    profile = _profile(small_cnn(batch=2), tmp_path)
    layers = {layer.name: layer for layer in profile.layers}
    conv, fc = layers["conv1"], layers["fc"]
    # ONNX operator spec (Conv): output N x M x H x W with pads 1, kernel 3, stride 1 keeps 8x8.
    # MACs of a convolution = output elements x (C_in / group) x kH x kW (common practice, no source).
    assert conv.output_shapes == ((2, 8, 8, 8),)
    assert conv.macs == 2 * 8 * 8 * 8 * 3 * 3 * 3
    assert conv.param_count == 8 * 3 * 3 * 3 + 8 and conv.param_bytes == conv.param_count * 4
    assert conv.input_bytes == 2 * 3 * 8 * 8 * 4 and conv.output_bytes == 2 * 8 * 8 * 8 * 4
    # Gemm: (2 x 128) @ (128 x 10) -> 256 MACs per row.
    assert fc.macs == 2 * 128 * 10
    assert profile.total_macs == sum(layer.macs for layer in profile.layers)
    # The two int64 scalars feeding the shape arithmetic are metadata, not parameters.
    assert profile.total_param_count == 8 * 27 + 8 + 10 * 128 + 10
    assert profile.coverage.node_share == 1.0 and profile.coverage.unmodelled == ()


def test_intensity_and_reuse_definitions(tmp_path: Path) -> None:
    # Roofline model (Williams, Waterman & Patterson, CACM 2009): operational intensity is
    # operations per byte of memory traffic; here FLOPs over parameter + activation bytes.
    conv = _profile(small_cnn(), tmp_path).layers[0]
    moved = conv.param_bytes + conv.input_bytes + conv.output_bytes
    assert conv.arithmetic_intensity == pytest.approx(conv.flops / moved)
    assert conv.param_reuse == pytest.approx(conv.macs / conv.param_bytes)


def test_macs_agree_with_numpy_matmul(tmp_path: Path) -> None:
    # numpy: a (5 x 7) @ (7 x 3) product has 5 * 3 outputs, each a 7-term dot product.
    a, b = np.ones((5, 7), np.float32), np.ones((7, 3), np.float32)
    proto = model([helper.make_node("MatMul", ["a", "b"], ["y"])], [vi("a", [5, 7])],
                  [vi("y", None)], [numpy_helper.from_array(b, "b")])
    layer = _profile(proto, tmp_path).layers[0]
    product = a @ b
    assert layer.macs == product.size * int(product[0, 0])
    assert layer.output_shapes[0] == product.shape


def test_shared_initializer_counted_once_in_totals(tmp_path: Path) -> None:
    nodes = [helper.make_node("MatMul", [f"t{i}", "w"], [f"t{i + 1}"]) for i in range(3000)]
    proto = model(nodes, [vi("t0", [1, 8])], [vi("t3000", None)], [weight("w", [8, 8])])
    profile = _profile(proto, tmp_path)
    assert all(layer.param_bytes == 256 and layer.param_names == ("w",) for layer in profile.layers)
    assert profile.total_param_count == 64 and profile.total_param_bytes == 256


def test_same_tensor_twice_is_read_once(tmp_path: Path) -> None:
    proto = model([helper.make_node("Mul", ["x", "x"], ["y"])], [vi("x", [4, 4])], [vi("y", None)])
    assert _profile(proto, tmp_path).layers[0].input_bytes == 64


@pytest.mark.parametrize("precision,bits", [("int8", 8), ("fp16", 16), ("int4", 4), ("bf16", 16),
                                            ("fp32", 32), ("FLOAT16", 16)])
def test_precision_changes_bytes_not_macs(tmp_path: Path, precision: str, bits: int) -> None:
    native = _profile(small_cnn(), tmp_path)
    deployed = _profile(small_cnn(), tmp_path, precision)
    for before, after in zip(native.layers, deployed.layers):
        # MACs never change; at an integer precision a matrix layer also requantizes
        # each output (5 ops, as QLinearConv does), nothing else changes its FLOPs.
        outputs = sum(g.m * g.n * g.count for g in before.work.gemms)
        requantize = REQUANTIZE_OPS_PER_OUTPUT * outputs if precision.startswith("int") else 0
        assert (after.macs, after.flops) == (before.macs, before.flops + requantize)
    conv_before, conv_after = native.layers[0], deployed.layers[0]
    # conv1: 216 weights and 8 biases; at an integer precision the bias is int32, the
    # accumulator's width (common practice, no source).
    bias_bits = 32 if precision.startswith("int") else bits
    assert conv_after.param_bytes == (216 * bits + 7) // 8 + 8 * bias_bits // 8
    assert conv_after.output_bytes == conv_before.output_bytes * bits // 32
    gather = next(x for x in deployed.layers if x.op_type == "Gather")
    assert gather.input_bytes == 4 * 8  # int64 tensors keep their size (the 4-element shape)
    assert gather.param_bytes == 0  # its int64 index is metadata, not a parameter
    assert deployed.total_macs == native.total_macs


def test_native_precision_and_unknown_precision(tmp_path: Path) -> None:
    assert _profile(small_cnn(), tmp_path).precision == "as deployed"
    assert _profile(small_cnn(), tmp_path, "native").precision == "as deployed"
    with pytest.raises(InputError, match="unknown precision 'int7'"):
        _profile(small_cnn(), tmp_path, "int7")


def test_custom_domain_op_is_unmodelled_not_zero(tmp_path: Path) -> None:
    nodes = [helper.make_node("MatMul", ["x", "w"], ["a"]),
             helper.make_node("Frobnicate", ["a"], ["b"], domain="vendor.x"),
             helper.make_node("Frobnicate", ["b"], ["y"], domain="vendor.x")]
    proto = model(nodes, [vi("x", [2, 8])], [vi("y", None)], [weight("w", [8, 8])],
                  extra_opsets=[helper.make_opsetid("vendor.x", 1)])
    profile = _profile(proto, tmp_path)
    coverage = profile.coverage
    assert (coverage.nodes_total, coverage.nodes_modelled) == (3, 1)
    (op,) = coverage.unmodelled
    assert (op.op_type, op.domain, op.count) == ("Frobnicate", "vendor.x", 2)
    assert "no cost model" in op.reason
    assert 0 < coverage.work_share < 1 and coverage.node_share == pytest.approx(1 / 3)
    assert not profile.layers[1].modelled and profile.layers[1].work is None


def test_unbound_dim_named_in_reason_and_notes(tmp_path: Path) -> None:
    profile = _profile(small_cnn(batch="batch"), tmp_path)
    conv = profile.layers[0]
    assert not conv.modelled and "--dim batch=N" in conv.unmodelled_reason
    assert "'batch'" in conv.unmodelled_reason
    assert any("--dim batch=N" in note for note in profile.notes)
    assert profile.total_macs == 0 and profile.coverage.node_share < 1
    bound = _profile(small_cnn(batch="batch"), tmp_path, batch=1)
    assert bound.coverage.node_share == 1.0


def test_unshaped_outputs_are_unmodelled_with_reason(tmp_path: Path) -> None:
    # NonZero's output length depends on the data: shape inference cannot know it.
    nodes = [helper.make_node("NonZero", ["x"], ["i"]), helper.make_node("Relu", ["x"], ["y"])]
    proto = model(nodes, [vi("x", [4, 4])], [vi("i", None, TensorProto.INT64), vi("y", None)])
    profile = _profile(proto, tmp_path)
    nonzero = profile.layers[0]
    assert not nonzero.modelled and "unknown" in nonzero.unmodelled_reason
    assert "--dim" not in nonzero.unmodelled_reason
    assert profile.layers[1].modelled


def test_loop_with_known_trip_count(tmp_path: Path) -> None:
    profile = _profile(loop_model(trip=5), tmp_path)
    loop = profile.layers[0]
    assert loop.modelled, loop.unmodelled_reason
    assert loop.macs == 5 * 1 * 4 * 4  # body MatMul (1x4 @ 4x4) x trip count
    # "w" is read inside the body; the trip count and condition are metadata.
    assert set(loop.param_names) == {"w"}
    assert loop.param_count == 16


def test_loop_with_runtime_trip_count_is_unmodelled(tmp_path: Path) -> None:
    loop = _profile(loop_model(trip=None), tmp_path).layers[0]
    assert not loop.modelled and "trip count" in loop.unmodelled_reason


def test_cost_function_crash_is_internal_error(tmp_path: Path, monkeypatch) -> None:
    def broken(node):
        raise ZeroDivisionError("boom")

    monkeypatch.setitem(registry._REGISTRY, ("", "Relu"), broken)
    with pytest.raises(InternalError, match="Relu"):
        _profile(chain(2), tmp_path)


@settings(max_examples=12, deadline=None)
@given(batch=st.integers(1, 3), cin=st.integers(1, 4), cout=st.integers(1, 5),
       size=st.integers(3, 9), kernel=st.integers(1, 3), stride=st.integers(1, 2))
def test_conv_shapes_and_macs_against_reference(tmp_path_factory, batch: int, cin: int,
                                                cout: int, size: int, kernel: int,
                                                stride: int) -> None:
    # Source: onnx.reference.ReferenceEvaluator computes the real output; its shape must match
    # the profile's, and MACs = output elements x C_in x kH x kW (common practice, no source).
    proto = model([helper.make_node("Conv", ["x", "w"], ["y"], strides=[stride, stride])],
                  [vi("x", [batch, cin, size, size])], [vi("y", None)],
                  [numpy_helper.from_array(np.ones((cout, cin, kernel, kernel), np.float32), "w")])
    layer = _profile(proto, tmp_path_factory.mktemp("conv")).layers[0]
    (out,) = ReferenceEvaluator(proto).run(None, {"x": np.ones((batch, cin, size, size), np.float32)})
    assert layer.output_shapes[0] == out.shape
    assert layer.macs == out.size * cin * kernel * kernel
    assert float(out.flat[0]) == cin * kernel * kernel  # each output sums that many products


def test_unsized_unknown_op_never_reads_as_nearly_covered(tmp_path: Path) -> None:
    # A custom op whose output shape no inference can know, feeding 49 modelled MatMuls:
    # the unknown op's work cannot be bounded, so the work share may not exceed the node
    # share (fail closed), although the MatMuls carry all the MACs we can count.
    nodes = [helper.make_node("Mystery", ["x"], ["m"], name="mystery", domain="example.custom")]
    nodes += [helper.make_node("MatMul", ["x" if i == 0 else f"h{i - 1}", "w"], [f"h{i}"],
                               name=f"mm{i}") for i in range(49)]
    proto = helper.make_model(
        helper.make_graph(nodes, "g", [vi("x", [1, 64])], [vi("h48", [1, 64]), vi("m", None)],
                          [weight("w", [64, 64])]),
        opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("example.custom", 1)])
    coverage = _profile(proto, tmp_path).coverage
    assert coverage.nodes_modelled == 49 and coverage.unsized_unmodelled_nodes == 1
    assert coverage.work_share <= coverage.node_share == 49 / 50
