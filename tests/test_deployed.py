"""The model as deployed: the same network in every export form costs the same.

Exporters write one network many ways (``gate.synth.forms``): weights as direct
initializers, behind Unsqueeze/Squeeze, Transpose, Cast or Reshape, built by
ConstantOfShape, or in Constant nodes; int8 as QDQ, QLinearConv/QLinearMatMul or
ConvInteger/MatMulInteger. What the device runs is the same, so MACs, parameter
count and bytes (at the same precision) must match and latency and energy agree
within 1 %. External checks: the ONNX operator specification (what each op and
each quantized form computes) and the published parameter counts of ResNet-50
(He et al. 2016) and MobileNetV1 (Howard et al. 2017) whichever way the weights
are written.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import onnx
import pytest
from onnx import TensorProto, helper

from gate.costmodel import ModelCost, cost_model
from gate.model.loader import load_model
from gate.profile import ModelProfile, profile_model
from gate.synth import archs, save_model
from gate.synth.forms import WEIGHT_FORMS, quantize, rewrite_weights
from gate.targets import load_target
from gate.targets.spec import TargetProfile
from tests.loadkit import model, vi, weight
from tests.test_costmodel import make_target
from tests.test_published_counts import PUBLISHED, _allowed_error, _conv_and_fc

F = TensorProto.FLOAT
TARGET = "ws-64x64-4mib"
_MATRIX_OPS = {"Conv", "Gemm", "MatMul", "LSTM", "GRU", "QLinearConv", "QLinearMatMul",
               "ConvInteger", "MatMulInteger"}


# ------------------------------------------------------------------ the networks

def _conv(bias: bool = True) -> onnx.ModelProto:
    inputs = ["x", "w", "b"] if bias else ["x", "w"]
    inits = [weight("w", [96, 64, 3, 3])] + ([weight("b", [96])] if bias else [])
    return model([helper.make_node("Conv", inputs, ["y"], pads=[1, 1, 1, 1], name="conv")],
                 [vi("x", [1, 64, 28, 28])], [vi("y", [1, 96, 28, 28])], inits)


def _depthwise(bias: bool = True) -> onnx.ModelProto:
    inputs = ["x", "w", "b"] if bias else ["x", "w"]
    inits = [weight("w", [128, 1, 3, 3])] + ([weight("b", [128])] if bias else [])
    return model([helper.make_node("Conv", inputs, ["y"], pads=[1, 1, 1, 1], group=128,
                                   name="dwconv")],
                 [vi("x", [1, 128, 28, 28])], [vi("y", [1, 128, 28, 28])], inits)


def _gemm(bias: bool = True) -> onnx.ModelProto:
    inputs = ["x", "w", "b"] if bias else ["x", "w"]
    inits = [weight("w", [512, 1024])] + ([weight("b", [512])] if bias else [])
    return model([helper.make_node("Gemm", inputs, ["y"], transB=1, name="fc")],
                 [vi("x", [8, 1024])], [vi("y", [8, 512])], inits)


def _matmul(bias: bool = True) -> onnx.ModelProto:
    return model([helper.make_node("MatMul", ["x", "w"], ["y"], name="proj")],
                 [vi("x", [1, 32, 1024])], [vi("y", [1, 32, 256])], [weight("w", [1024, 256])])


def _recurrent(cell: str) -> Callable[[bool], onnx.ModelProto]:
    def build(bias: bool = True) -> onnx.ModelProto:
        gates = 4 if cell == "LSTM" else 3
        inits = [weight("W", [1, gates * 256, 80]), weight("R", [1, gates * 256, 256]),
                 weight("B", [1, 2 * gates * 256])]
        node = helper.make_node(cell, ["x", "W", "R", "B"], ["y", "y_h"], hidden_size=256,
                                name=cell.lower(), **({"linear_before_reset": 1}
                                                      if cell == "GRU" else {}))
        return model([node], [vi("x", [50, 1, 80])], [vi("y", [50, 1, 1, 256])], inits)
    return build


FAMILIES: dict[str, Callable[[bool], onnx.ModelProto]] = {
    "conv": _conv, "depthwise": _depthwise, "gemm": _gemm, "matmul": _matmul,
    "lstm": _recurrent("LSTM"), "gru": _recurrent("GRU"),
}
QOPERATOR_FAMILIES = ("conv", "depthwise", "gemm", "matmul")
# ConvInteger/MatMulInteger write int32 and leave the rescale to later nodes: a lone one is
# the same network only where that rescale is negligible beside the MACs (K >= 576 here);
# a 3x3 depthwise conv has K = 9, so its requantization is a third of its work.
INTEGER_FAMILIES = ("conv", "gemm", "matmul")


def _profile(proto: onnx.ModelProto, folder: Path, label: str, precision: str | None = None,
             dims: dict[str, int] | None = None) -> ModelProfile:
    path = save_model(proto, folder / f"{label}.onnx")
    return profile_model(load_model(str(path), dims or {}), precision)


def _same_cost(a: tuple[ModelProfile, ModelCost], b: tuple[ModelProfile, ModelCost],
               label: str, tolerance: float = 0.01) -> None:
    (pa, ca), (pb, cb) = a, b
    assert pa.total_macs == pb.total_macs, label
    assert pa.total_param_count == pb.total_param_count, label
    assert pa.total_param_bytes == pb.total_param_bytes, label
    assert cb.latency_s == pytest.approx(ca.latency_s, rel=tolerance), label
    assert cb.energy.total_j == pytest.approx(ca.energy.total_j, rel=tolerance), label


def _weights_charged(profile: ModelProfile, label: str) -> None:
    """No layer that consumes a weight reports 0 parameter bytes; folded nodes hold none."""
    for layer in profile.layers:
        if layer.role == "layer" and layer.op_type in _MATRIX_OPS:
            assert layer.param_bytes > 0 and layer.param_count > 0, (label, layer.name)
        if layer.role != "layer":
            assert layer.param_bytes == 0 and layer.macs == 0, (label, layer.name)


# ------------------------------------------------------------------ weight forms

@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_every_weight_form_costs_the_same(family: str, tmp_path: Path) -> None:
    target = load_target(TARGET)
    build = FAMILIES[family]
    direct = _profile(build(True), tmp_path, "direct")
    reference = (direct, cost_model(direct, target))
    for form in WEIGHT_FORMS[1:]:
        profile = _profile(rewrite_weights(build(True), form), tmp_path, form)
        _weights_charged(profile, f"{family}/{form}")
        assert sum(1 for layer in profile.layers if layer.role == "folded") >= 1, form
        _same_cost(reference, (profile, cost_model(profile, target)), f"{family}/{form}")


@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_every_int8_form_costs_the_same(family: str, tmp_path: Path) -> None:
    # ONNX operator spec: QLinearConv/QLinearMatMul/ConvInteger/MatMulInteger compute the
    # float op on dequantized values, and a QDQ graph's float op reads DequantizeLinear of
    # int8 tensors: the same int8 network as the float one deployed at int8.
    target = load_target(TARGET)
    build = FAMILIES[family]
    at_int8 = _profile(build(False), tmp_path, "fp32", "int8")
    assert {layer.precision for layer in at_int8.layers if layer.macs} == {"int8"}
    reference = (at_int8, cost_model(at_int8, target))
    forms = ["qdq"] + (["qlinear"] if family in QOPERATOR_FAMILIES else []) + (
        ["integer"] if family in INTEGER_FAMILIES else [])
    for form in forms:
        profile = _profile(quantize(build(False), form), tmp_path, form)
        label = f"{family}/{form}"
        _weights_charged(profile, label)
        assert {layer.precision for layer in profile.layers if layer.macs} == {"int8"}, label
        assert not [layer.name for layer in profile.layers
                    if layer.role == "layer" and layer.op_type in ("QuantizeLinear",
                                                                   "DequantizeLinear")], label
        _same_cost(reference, (profile, cost_model(profile, target)), label)


def test_qdq_with_biases_stores_them_int32_like_an_int8_deployment(tmp_path: Path) -> None:
    # A QDQ export stores a bias as int32 (the accumulator's width); --precision int8 on the
    # float model counts the bias the same way (common practice, no source).
    at_int8 = _profile(_conv(True), tmp_path, "fp32", "int8")
    qdq = _profile(quantize(_conv(True), "qdq"), tmp_path, "qdq")
    assert qdq.total_param_bytes == at_int8.total_param_bytes == 96 * 64 * 9 + 96 * 4


def test_a_float_export_costs_at_its_float_type_with_a_note(tmp_path: Path) -> None:
    profile = _profile(_conv(), tmp_path, "fp32")
    assert profile.precision == "as deployed"
    assert [layer.precision for layer in profile.layers] == ["fp32"]
    cost = cost_model(profile, load_target(TARGET))
    assert cost.precision == "fp32"
    assert any("--precision int8" in note for note in cost.notes), cost.notes


# ------------------------------------------------------------------ parameters

def test_one_packed_weight_sliced_six_ways_is_charged_once(tmp_path: Path) -> None:
    nodes = []
    for i in range(6):
        nodes += [helper.make_node("Slice", ["packed", f"s{i}", f"e{i}", "axis0"], [f"w{i}"],
                                   name=f"slice{i}"),
                  helper.make_node("MatMul", ["x", f"w{i}"], [f"y{i}"], name=f"mm{i}")]
    inits = [weight("packed", [6 * 64, 128])] + [
        helper.make_tensor(f"s{i}", TensorProto.INT64, [1], [64 * i]) for i in range(6)] + [
        helper.make_tensor(f"e{i}", TensorProto.INT64, [1], [64 * (i + 1)]) for i in range(6)] + [
        helper.make_tensor("axis0", TensorProto.INT64, [1], [0])]
    proto = model(nodes, [vi("x", [4, 64])], [vi(f"y{i}", None) for i in range(6)], inits)
    profile = _profile(proto, tmp_path, "packed")
    matmuls = [layer for layer in profile.layers if layer.op_type == "MatMul"]
    assert [layer.param_bytes for layer in matmuls] == [64 * 128 * 4] * 6
    slices = [layer for layer in profile.layers if layer.op_type == "Slice"]
    assert {layer.role for layer in slices} == {"folded"} and not any(s.param_bytes for s in slices)
    assert profile.total_param_bytes == 6 * 64 * 128 * 4  # the packed tensor, once
    cost = cost_model(profile, load_target(TARGET))
    assert cost.param_dram_bytes == 6 * 64 * 128 * 4


def _shared_weight_model() -> onnx.ModelProto:
    nodes = [helper.make_node("MatMul", ["x", "w"], ["h"], name="first"),
             helper.make_node("MatMul", ["h", "w"], ["y"], name="second")]
    return model(nodes, [vi("x", [1, 512])], [vi("y", [1, 512])], [weight("w", [512, 512])])


def test_a_shared_weight_that_fits_is_fetched_once(tmp_path: Path) -> None:
    profile = _profile(_shared_weight_model(), tmp_path, "shared")
    one_mib = 512 * 512 * 4
    assert [layer.param_bytes for layer in profile.layers] == [one_mib, one_mib]
    assert profile.total_param_bytes == one_mib and profile.shared_param_bytes == one_mib
    cost = cost_model(profile, load_target(TARGET))  # 4 MiB parameter buffer
    assert [layer.param_dram_bytes for layer in cost.layers] == [one_mib, 0]


def test_a_shared_weight_that_does_not_fit_is_fetched_per_use(tmp_path: Path) -> None:
    profile = _profile(_shared_weight_model(), tmp_path, "shared")
    small = make_target(param_bytes=512 * 1024)  # half the shared weight
    cost = cost_model(profile, small)
    assert all(layer.param_dram_bytes >= 512 * 512 * 4 for layer in cost.layers)


# ------------------------------------------------------------------ published counts

_FORMS_BY_NETWORK = {
    "resnet50": ("view", "transpose", "cast", "constant_of_shape"),
    "mobilenet_v1_1.0_224": ("view", "reshape", "constant_of_shape", "constant"),
}


@pytest.mark.parametrize("label", sorted(_FORMS_BY_NETWORK))
def test_published_parameter_counts_hold_in_every_weight_form(label: str, tmp_path: Path) -> None:
    # He et al. 2016 (ResNet-50: 25.5 M in Xie et al. 2017, Table 1, conv and FC layers) and
    # Howard et al. 2017, Table 6 (MobileNetV1 1.0: 4.2 M), as in test_published_counts.
    figure = next(f for f in PUBLISHED if f.label == label and f.metric == "params")
    base = figure.build()
    direct = _profile(base, tmp_path, "direct", dims={"batch": 1})
    for form in _FORMS_BY_NETWORK[label]:
        profile = _profile(rewrite_weights(base, form), tmp_path, form, dims={"batch": 1})
        _, params = _conv_and_fc(profile)
        assert abs(params - figure.value) <= _allowed_error(figure), (form, params)
        assert profile.total_param_count == direct.total_param_count, form
        assert profile.total_macs == direct.total_macs, form
        _weights_charged(profile, f"{label}/{form}")


def test_mobilenet_v1_qdq_keeps_its_published_parameter_count(tmp_path: Path) -> None:
    # Howard et al. 2017, Table 6: 4.2 M parameters; int8 QDQ stores one byte per weight.
    figure = next(f for f in PUBLISHED if f.label == "mobilenet_v1_1.0_224"
                  and f.metric == "params")
    profile = _profile(quantize(archs.mobilenet_v1(fold_bn=True), "qdq"), tmp_path, "qdq",
                       dims={"batch": 1})
    _, params = _conv_and_fc(profile)
    assert abs(params - figure.value) <= _allowed_error(figure)
    conv_layers = [layer for layer in profile.layers if layer.op_type == "Conv"]
    assert {layer.precision for layer in conv_layers} == {"int8"}
    weights = sum(layer.param_bytes for layer in conv_layers)
    assert weights < 1.2 * figure.value  # int8 weights plus int32 biases, not 4 bytes each


# ------------------------------------------------------------------ the speech LSTM

def _speech_target() -> TargetProfile:
    # Test-declared: 32 x 32 PEs at 1 GHz, one MAC per PE per cycle = 2.05 TFLOP/s peak,
    # a 4 MB parameter buffer.
    return make_target(rows=32, cols=32, clock_hz=1e9, param_bytes=4 * 10**6,
                       act_bytes=2 * 10**6)


@pytest.mark.parametrize("form", ["direct", "view", "cast", "constant_of_shape", "qdq"])
def test_speech_lstm_energy_is_parameter_dram_whatever_the_form(form: str,
                                                                tmp_path: Path) -> None:
    # Common practice, no source: a 2 x 1024 LSTM (input 80, 100 steps) whose recurrent
    # weights exceed the parameter buffer streams them every step; that traffic is well over
    # half of its energy, however the exporter wrote the weights.
    base = archs.recurrent_classifier("lstm", hidden_size=1024, input_size=80, seq=100, batch=1)
    proto = quantize(base, "qdq") if form == "qdq" else rewrite_weights(base, form)
    profile = _profile(proto, tmp_path, form)
    cost = cost_model(profile, _speech_target())
    assert cost.energy.dram_param_j > 0.6 * cost.energy.total_j, form
    lstms = [layer for layer in profile.layers if layer.op_type == "LSTM"]
    assert len(lstms) == 2 and all(layer.param_bytes > 4 * 10**6 for layer in lstms)


# ------------------------------------------------------------------ If, no-ops

def _if_model(condition: str) -> onnx.ModelProto:
    """An If whose then-branch holds a 1024 x 1024 weight, the else-branch a 16 x 1024 one.

    ``condition``: "constant" (an initializer), "folded" (Equal(initializer, Constant), a
    sample-rate check), "false" (the folded check fails) or "runtime" (a graph input).
    """
    big = helper.make_graph([helper.make_node("MatMul", ["x", "w_big"], ["y_then"], name="big")],
                            "then", [], [vi("y_then", [1, 1024])])
    small = helper.make_graph([helper.make_node("MatMul", ["x", "w_small"], ["y_small"],
                                                name="small"),
                               helper.make_node("Pad", ["y_small", "pads"], ["y_else"],
                                                name="pad")],
                              "else", [], [vi("y_else", [1, 1024])])
    inits = [weight("w_big", [1024, 1024]), weight("w_small", [1024, 16]),
             helper.make_tensor("pads", TensorProto.INT64, [4], [0, 0, 0, 1008]),
             helper.make_tensor("rate", TensorProto.INT64, [], [16000])]
    nodes, inputs = [], [vi("x", [1, 1024])]
    if condition == "constant":
        inits.append(helper.make_tensor("cond", TensorProto.BOOL, [], [True]))
    elif condition == "runtime":
        inputs.append(vi("cond", [], TensorProto.BOOL))
    else:
        wanted = 16000 if condition == "folded" else 8000
        nodes += [helper.make_node("Constant", [], ["wanted"], name="wanted",
                                   value=helper.make_tensor("v", TensorProto.INT64, [], [wanted])),
                  helper.make_node("Equal", ["rate", "wanted"], ["cond"], name="is_16k")]
    nodes.append(helper.make_node("If", ["cond"], ["y"], then_branch=big, else_branch=small,
                                  name="branch"))
    return model(nodes, inputs, [vi("y", [1, 1024])], inits)


@pytest.mark.parametrize("condition,params", [
    ("constant", 1024 * 1024), ("folded", 1024 * 1024), ("false", 1024 * 16),
    ("runtime", 1024 * 1024)])
def test_if_costs_only_the_branch_it_takes_parameters_included(condition: str, params: int,
                                                               tmp_path: Path) -> None:
    profile = _profile(_if_model(condition), tmp_path, condition)
    branch = next(layer for layer in profile.layers if layer.op_type == "If")
    assert branch.param_count == params and profile.total_param_count == params
    assert branch.macs == params  # one row through the counted branch's weight
    note = branch.work.note if branch.work else ""
    if condition == "runtime":
        assert "run time" in note and "costlier then_branch" in note
    else:
        assert "condition constant" in note
    if condition in ("folded", "false"):  # Equal(initializer, Constant) folds offline
        equal = next(layer for layer in profile.layers if layer.op_type == "Equal")
        assert equal.role == "folded"


@pytest.mark.parametrize("opset", [6, 7, 8, 9, 10, 11, 12, 13])
def test_dropout_of_every_opset_is_a_no_op(opset: int, tmp_path: Path) -> None:
    # ONNX operator spec, Dropout-6 to -13: at inference (is_test=1 before opset 7, no
    # training_mode after 12) output = input; the optional mask output goes unused.
    attrs = {"is_test": 1} if opset < 7 else {}
    nodes = [helper.make_node("Dropout", ["x"], ["d", "mask"], name="drop", **attrs),
             helper.make_node("Identity", ["d"], ["i"], name="same"),
             helper.make_node("Relu", ["i"], ["y"], name="relu")]
    profile = _profile(model(nodes, [vi("x", [1, 64])], [vi("y", [1, 64])], opset=opset),
                       tmp_path, f"dropout{opset}")
    drop, same, _ = profile.layers
    assert drop.modelled and same.modelled, (drop.unmodelled_reason, same.unmodelled_reason)
    assert drop.work is not None and drop.work.is_view and drop.flops == 0
    assert same.work is not None and same.work.is_view
    assert profile.coverage.node_share == 1.0


@pytest.mark.parametrize("opset", [7, 8, 9])
def test_old_batch_norm_with_unused_training_outputs_is_inference_batch_norm(
        opset: int, tmp_path: Path) -> None:
    # ONNX operator spec, BatchNormalization-7/9: spatial=1 (opset 7-8) normalises per
    # channel, as later opsets always do; the running-statistics outputs are training
    # outputs, unused at inference. Same count as the opset-15 op on the same shapes.
    attrs = {"spatial": 1} if opset < 9 else {}
    outputs = ["y", "mean_out", "var_out", "saved_mean", "saved_var"]
    node = helper.make_node("BatchNormalization", ["x", "s", "b", "m", "v"], outputs,
                            name="bn", **attrs)
    inits = [weight(name, [16]) for name in "sbmv"]
    old = _profile(model([node], [vi("x", [1, 16, 8, 8])], [vi("y", [1, 16, 8, 8])], inits,
                         opset=opset), tmp_path, f"bn{opset}")
    new_node = helper.make_node("BatchNormalization", ["x", "s", "b", "m", "v"], ["y"], name="bn")
    new = _profile(model([new_node], [vi("x", [1, 16, 8, 8])], [vi("y", [1, 16, 8, 8])], inits,
                         opset=15), tmp_path, "bn15")
    assert old.layers[0].modelled, old.layers[0].unmodelled_reason
    assert old.layers[0].flops == new.layers[0].flops > 0
    assert old.layers[0].output_bytes == new.layers[0].output_bytes


# ------------------------------------------------------------------ precision in every output

def test_records_and_reports_say_which_precision_each_layer_ran_at(tmp_path: Path) -> None:
    from dataclasses import replace

    from gate.records import layer_from_dict, layer_to_dict, run_from_dict, run_to_dict
    from gate.report import html_tables, markdown
    from gate.summarize import build_run_record
    from tests.recordkit import entry, layer, result, run

    target = load_target(TARGET)
    profile = _profile(quantize(_conv(False), "qdq"), tmp_path, "qdq")
    record = build_run_record("conv.onnx", profile, cost_model(profile, target), target)
    (conv,) = [item for item in record.layers if item.op_type == "Conv"]
    assert conv.precision == "int8"
    assert run_from_dict(run_to_dict(record)) == record  # snapshots keep it
    old = {key: value for key, value in layer_to_dict(conv).items() if key != "precision"}
    assert layer_from_dict(old).precision == ""  # a document written before the field
    # A changed layer names its precision change; the HTML layer table has the column.
    base = run(layers=(replace(layer("stem/conv", macs=2000), precision="fp32"),))
    head = run(layers=(replace(layer("stem/conv", macs=1000), precision="int8"),))
    rows = [line for line in markdown.render(result(entry(head, base))).splitlines()
            if line.startswith("| stem/conv")]
    assert rows and "Conv (fp32 → int8)" in rows[0]
    html = html_tables.layer_table(entry(head))
    assert "<th" in html and "precision" in html and "<td>int8</td>" in html


def test_profile_outputs_show_precision_and_role(tmp_path: Path) -> None:
    import csv
    import io
    import json

    from gate.report.profile_text import render

    profile = _profile(rewrite_weights(_conv(), "view"), tmp_path, "view")
    rows = list(csv.DictReader(io.StringIO(render("csv", profile, [], []))))
    assert {(r["op_type"], r["precision"], r["role"]) for r in rows} >= {
        ("Conv", "fp32", "layer"), ("Squeeze", "fp32", "folded")}
    layers = json.loads(render("json", profile, [], []))["layers"]
    assert {(item["op_type"], item["role"]) for item in layers} >= {("Squeeze", "folded")}
    table = render("table", profile, [], [])
    assert "precision" in table and "folded" in table


def test_folded_nodes_inside_a_loop_body_cost_nothing(tmp_path: Path) -> None:
    # The body reads the outer weight through a Transpose: folded offline like at the top level,
    # so the Loop costs its MatMul only and is charged the weight once.
    body = helper.make_graph(
        [helper.make_node("Transpose", ["w"], ["w_t"], perm=[1, 0], name="body_t"),
         helper.make_node("MatMul", ["h_in", "w_t"], ["h_out"], name="body_mm"),
         helper.make_node("Identity", ["cond_in"], ["cond_out"], name="body_cond")],
        "body", [vi("i", [], TensorProto.INT64), vi("cond_in", [], TensorProto.BOOL),
                 vi("h_in", [1, 64])], [vi("cond_out", [], TensorProto.BOOL), vi("h_out", [1, 64])])
    inits = [weight("w", [64, 64]), helper.make_tensor("m", TensorProto.INT64, [], [5]),
             helper.make_tensor("cond", TensorProto.BOOL, [], [True])]
    node = helper.make_node("Loop", ["m", "cond", "h0"], ["h"], body=body, name="loop")
    profile = _profile(model([node], [vi("h0", [1, 64])], [vi("h", [1, 64])], inits), tmp_path,
                       "loop")
    (loop,) = profile.layers
    assert loop.macs == 5 * 64 * 64 and loop.flops == 2 * loop.macs  # no Transpose copy
    assert loop.param_names == ("w",) and loop.param_bytes == 64 * 64 * 4


def test_small_values_are_computed_only_for_small_outputs_of_known_size() -> None:
    # onnx.reference runs the op (ONNX spec semantics), but only when every output is an
    # integer tensor of known size within the limit: a hostile Range or Tile is never run.
    from gate.model.constants import small_values
    from gate.model.graph import TensorInfo

    scalar = TensorInfo("a", (), "INT64")
    equal = helper.make_node("Equal", ["a", "b"], ["c"])
    known = small_values(equal, [scalar, TensorInfo("b", (), "INT64")], [(16000,), (16000,)],
                         [TensorInfo("c", (), "BOOL")], 17)
    assert known == {"c": (1,)}
    ranged = helper.make_node("Range", ["a", "b", "d"], ["r"])
    inputs = [scalar, TensorInfo("b", (), "INT64"), TensorInfo("d", (), "INT64")]
    for size in (None, (10**12,)):
        out = TensorInfo("r", size, "INT64")
        assert small_values(ranged, inputs, [(0,), (10**12,), (1,)], [out], 17) == {}
