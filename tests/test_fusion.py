"""Tests for layer fusion (gate/fusion.py and its costing in gate/costmodel.py).

External checks: the models are built with onnx.helper and shape-inferred by onnx
(the ONNX operator specification fixes which ops are elementwise); MobileNetV1 and
ResNet-50 are rebuilt from their papers (Howard et al. 2017; He et al. 2016) in
gate/synth/archs.py. What a group costs is checked by hand from the per-layer byte
counts. Trade facts are marked common practice, no source.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from onnx import helper, numpy_helper

from gate.cli import cli
from gate.costmodel import cost_model, layer_engine
from gate.diff import diff_runs
from gate.fusion import plan_fusion
from gate.jobs import analyse
from gate.model.loader import load_model
from gate.profile import ModelProfile, profile_model
from gate.records import layer_from_dict, layer_to_dict
from gate.summarize import build_run_record
from gate.synth import archs
from gate.synth.builder import save_model
from gate.targets import load_target
from gate.targets.spec import TargetProfile
from tests.loadkit import model, save, vi, weight

WS = "ws-64x64-4mib"


def _bn(name: str, x: str, channels: int) -> tuple[object, list[object]]:
    params = [f"{name}.{p}" for p in ("scale", "bias", "mean", "var")]
    node = helper.make_node("BatchNormalization", [x, *params], [f"{name}.out"], name=name)
    return node, [weight(p, [channels]) for p in params]


def residual_block(renamed: str = "") -> object:
    """conv1 -> bn1 -> relu1 -> conv2 -> bn2 -> add(+x) -> relu2: a ResNet basic block."""
    bn1, bn1_params = _bn(f"{renamed}bn1", "c1", 16)
    bn2, bn2_params = _bn(f"{renamed}bn2", "c2", 16)
    nodes = [
        helper.make_node("Conv", ["x", "w1"], ["c1"], pads=[1, 1, 1, 1], name=f"{renamed}conv1"),
        bn1,
        helper.make_node("Relu", [f"{renamed}bn1.out"], ["r1"], name=f"{renamed}relu1"),
        helper.make_node("Conv", ["r1", "w2"], ["c2"], pads=[1, 1, 1, 1], name=f"{renamed}conv2"),
        bn2,
        helper.make_node("Add", [f"{renamed}bn2.out", "x"], ["s"], name=f"{renamed}add"),
        helper.make_node("Relu", ["s"], ["y"], name=f"{renamed}relu2"),
    ]
    inits = [weight("w1", [16, 16, 3, 3]), weight("w2", [16, 16, 3, 3]), *bn1_params, *bn2_params]
    return model(nodes, [vi("x", [1, 16, 32, 32])], [vi("y", None)], inits)  # type: ignore[arg-type]


def _profile(proto: object, tmp_path: Path, precision: str | None = None) -> ModelProfile:
    path = save(proto, tmp_path / "model.onnx")  # type: ignore[arg-type]
    return profile_model(load_model(path, {}), precision)


def _plan(profile: ModelProfile, target: TargetProfile) -> dict[str, list[str]]:
    assert target.fusion is not None
    plan = plan_fusion(profile, target.fusion, lambda layer: layer_engine(layer, target))
    return {profile.layers[g.head].name: [profile.layers[m].name for m in g.members]
            for g in plan.groups}


# ------------------------------------------------------------------ which layers group

def test_residual_block_fuses_bn_activation_and_residual_add_into_its_convs(tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    assert _plan(profile, load_target(WS)) == {
        "conv1": ["bn1", "relu1"], "conv2": ["bn2", "add", "relu2"]}
    cost = cost_model(profile, load_target(WS))
    by_name = {layer.name: layer for layer in cost.layers}
    assert by_name["conv2"].fused_ops == ("BatchNormalization", "Add", "Relu")
    assert by_name["add"].engine == "fusion-member" and by_name["add"].fused_into == "conv2"
    assert by_name["add"].latency_s == 0.0 and by_name["add"].energy.total_j == 0.0
    spilled = {c.name: c for c in cost_model(profile, _spilling(load_target(WS))).layers}
    assert not spilled["conv2"].activations_fit and spilled["add"].activations_fit  # head's fit


def test_epilogue_limit_and_target_choices_decide_the_group(tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    small = load_target("os-16x16-512kib")  # one epilogue op: the residual Add, not the Relu after
    assert _plan(profile, small) == {"conv1": ["bn1", "relu1"], "conv2": ["bn2", "add"]}
    ws = load_target(WS)
    assert ws.fusion is not None
    no_add = replace(ws, fusion=replace(ws.fusion, epilogue=frozenset({"Relu"})))
    assert _plan(profile, no_add) == {"conv1": ["bn1", "relu1"], "conv2": ["bn2"]}


def test_chains_stop_at_shared_tensors_outputs_late_folds_and_activation_operands(
        tmp_path: Path) -> None:
    nodes = [
        helper.make_node("Conv", ["x", "w"], ["c"], name="conv"),
        helper.make_node("Relu", ["c"], ["r"], name="relu"),  # c also feeds the Mul below
        helper.make_node("Mul", ["c", "r"], ["m"], name="gate_mul"),  # activation operand
        helper.make_node("Conv", ["m", "w2"], ["c2"], name="conv2"),
        helper.make_node("Relu", ["c2"], ["r2"], name="relu2"),
        helper.make_node("Mul", ["r2", "s"], ["y"], name="scale_after_relu"),  # fold after epilogue
        helper.make_node("Conv", ["y", "w3"], ["z"], name="conv3"),
        helper.make_node("Relu", ["z"], ["out"], name="relu3"),
    ]
    inits = [weight("w", [8, 8, 1, 1]), weight("w2", [8, 8, 1, 1]), weight("s", [1, 8, 1, 1]),
             weight("w3", [8, 8, 1, 1])]
    proto = model(nodes, [vi("x", [1, 8, 4, 4])], [vi("z", None), vi("out", None)], inits)
    profile = _profile(proto, tmp_path)
    # conv: its output has two readers; conv2: the constant Mul comes after the Relu (not
    # foldable, and Mul is no epilogue); conv3: its output is a graph output.
    assert _plan(profile, load_target(WS)) == {"conv2": ["relu2"]}


def test_constant_pad_becomes_the_convs_padding_where_the_target_says(tmp_path: Path) -> None:
    pads = numpy_helper.from_array(np.array([0, 0, 1, 1, 0, 0, 1, 1], np.int64), "pads")
    nodes = [helper.make_node("Pad", ["x", "pads"], ["p"], name="pad"),
             helper.make_node("Conv", ["p", "w"], ["c"], name="conv"),
             helper.make_node("Relu", ["c"], ["y"], name="relu")]
    proto = model(nodes, [vi("x", [1, 8, 16, 16])], [vi("y", None)], [pads, weight("w", [8, 8, 3, 3])])
    profile = _profile(proto, tmp_path)
    assert _plan(profile, load_target(WS)) == {"conv": ["pad", "relu"]}  # pad_into_conv: true
    assert _plan(profile, load_target("os-16x16-512kib")) == {"conv": ["relu"]}
    ws = load_target(WS)
    group = plan_fusion(profile, ws.fusion, lambda layer: layer_engine(layer, ws)).groups[0]  # type: ignore[arg-type]
    pad, relu = profile.layers[0], profile.layers[2]
    assert group.input_bytes == pad.input_bytes  # the unpadded tensor: 1x8x16x16 fp32
    assert group.input_bytes == 8 * 16 * 16 * 4
    assert group.output_bytes == relu.output_bytes


# ------------------------------------------------------------------ what a group costs

def _spilling(target: TargetProfile) -> TargetProfile:
    """The target with an activation buffer too small for any layer: every layer spills."""
    return replace(target, activation_buffer_bytes=64)


def test_a_group_reads_its_outside_inputs_once_and_writes_its_final_output_once(
        tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    target = _spilling(load_target(WS))
    fused = {c.name: c for c in cost_model(profile, target).layers}
    alone = {c.name: c for c in cost_model(profile, target, fusion=False).layers}
    layers = {layer.name: layer for layer in profile.layers}
    act_bytes = 16 * 32 * 32 * 4  # every activation is 1x16x32x32 fp32
    # conv2 + bn2 + add + relu2: reads r1 and the shortcut x, writes y.
    assert fused["conv2"].act_dram_bytes == 3 * act_bytes
    # Layer by layer: each of the four reads its inputs and writes its output.
    unfused = sum(layers[n].input_bytes + layers[n].output_bytes
                  for n in ("conv2", "bn2", "add", "relu2"))
    assert unfused == 9 * act_bytes
    assert sum(alone[n].act_dram_bytes for n in ("conv2", "bn2", "add", "relu2")) == unfused
    assert fused["conv2"].latency_s < sum(alone[n].latency_s
                                          for n in ("conv2", "bn2", "add", "relu2"))


def test_epilogue_on_the_vector_unit_overlaps_the_array_and_on_the_output_path_is_free(
        tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    ws = load_target(WS)
    assert ws.fusion is not None and ws.vector is not None
    slow_vector = replace(ws.vector, ops_per_cycle=0.01)  # epilogue takes longer than the array
    on_path = replace(ws, vector=slow_vector)
    on_vector = replace(on_path, fusion=replace(ws.fusion, epilogue_engine="vector"))
    conv_path = cost_model(profile, on_path).layers[3]
    conv_vector = cost_model(profile, on_vector).layers[3]
    assert conv_path.compute_s == pytest.approx(conv_path.cycles / ws.clock_hz)  # array time only
    epilogue_ops = sum(profile.layers[i].work.vector_ops for i in (5, 6))  # type: ignore[union-attr]
    assert conv_vector.compute_s == pytest.approx(epilogue_ops / slow_vector.ops_per_s)


# ------------------------------------------------------------------ invariants

def _records(profile: ModelProfile, target: TargetProfile, fusion: bool) -> object:
    return build_run_record("m.onnx", profile, cost_model(profile, target, fusion=fusion), target)


@pytest.mark.parametrize("target_name", ["ws-64x64-4mib", "os-16x16-512kib", "mv-8x8-near-mem",
                                         "vec-dsp-128"])
def test_fusion_keeps_macs_and_parameters_and_lowers_activation_traffic_and_latency(
        target_name: str, tmp_path_factory: pytest.TempPathFactory) -> None:
    path = tmp_path_factory.mktemp("m") / "mobilenet.onnx"
    save_model(archs.mobilenet_v1(), path)  # Howard et al. 2017, rebuilt
    profile = profile_model(load_model(path, {"batch": 1}), "fp32")
    target = load_target(target_name)
    fused, alone = _records(profile, target, True), _records(profile, target, False)
    for metric in ("macs", "flops", "param_count", "param_bytes", "layers"):
        assert fused.metrics[metric] == alone.metrics[metric], metric  # type: ignore[attr-defined]
    assert [layer.metrics["macs"] for layer in fused.layers] == [  # type: ignore[attr-defined]
        layer.metrics["macs"] for layer in alone.layers]  # type: ignore[attr-defined]
    assert fused.metrics["act_dram_bytes"] < alone.metrics["act_dram_bytes"]  # type: ignore[attr-defined]
    assert fused.metrics["latency_s"] < alone.metrics["latency_s"]  # type: ignore[attr-defined]


def test_a_model_with_nothing_to_fuse_costs_the_same_with_and_without_fusion(
        tmp_path: Path) -> None:
    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], pads=[1, 1, 1, 1], name="conv"),
             helper.make_node("MaxPool", ["c"], ["p"], kernel_shape=[2, 2], strides=[2, 2],
                              name="pool"),
             helper.make_node("Softmax", ["p"], ["y"], axis=1, name="softmax")]
    proto = model(nodes, [vi("x", [1, 8, 16, 16])], [vi("y", None)], [weight("w", [8, 8, 3, 3])])
    profile = _profile(proto, tmp_path)
    for name in ("ws-64x64-4mib", "os-16x16-512kib", "mv-8x8-near-mem", "vec-dsp-128"):
        target = load_target(name)
        assert cost_model(profile, target) == cost_model(profile, target, fusion=False)


def test_a_target_without_fusion_costs_layer_by_layer(tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    ws = load_target(WS)
    assert cost_model(profile, replace(ws, fusion=None)) == cost_model(profile, ws, fusion=False)
    assert all(layer.engine != "fusion-member" for layer in cost_model(profile, ws, fusion=False).layers)


def test_resnet50_on_a_2_tflops_weight_stationary_array_runs_at_about_half_of_peak(
        tmp_path_factory: pytest.TempPathFactory) -> None:
    # Common practice, no source: CNNs average roughly half of peak on a large
    # weight-stationary array of about 2 TFLOP/s with 4 MiB of parameter and 2 MiB of
    # activation buffer (tests/tradekit.py declares that array: 2.05 TFLOP/s). A range.
    from tests.tradekit import trade_sized_target

    path = tmp_path_factory.mktemp("m") / "resnet50.onnx"
    save_model(archs.resnet50(), path)  # He et al. 2016, rebuilt
    profile = profile_model(load_model(path, {"batch": 1}), "fp16")
    target = trade_sized_target()
    assert target.peak_flops_per_s("fp16") == pytest.approx(2.05e12, rel=0.01)
    for fusion in (True, False):
        cost = cost_model(profile, target, fusion=fusion)
        share = profile.total_flops / cost.latency_s / cost.peak_flops_per_s
        assert 0.3 <= share <= 0.7, (fusion, share)


# ------------------------------------------------------------------ records, diff, CLI

def test_records_carry_the_group_and_round_trip(tmp_path: Path) -> None:
    profile = _profile(residual_block(), tmp_path)
    record = _records(profile, load_target(WS), True)
    conv2 = record.layer("conv2")  # type: ignore[attr-defined]
    relu2 = record.layer("relu2")  # type: ignore[attr-defined]
    assert conv2.fused_label == "conv2+BatchNormalization+Add+Relu"
    assert relu2.fused_label == "in conv2"
    assert layer_from_dict(layer_to_dict(conv2)) == conv2
    old = {k: v for k, v in layer_to_dict(relu2).items() if not k.startswith("fused")}
    assert layer_from_dict(old).fused_into == ""  # documents written before fusion still load


def test_layer_diff_matches_renamed_layers_of_fused_groups(tmp_path: Path) -> None:
    base = analyse(str(save(residual_block(), tmp_path / "a.onnx")), [load_target(WS)])[0]
    head = analyse(str(save(residual_block("v2_"), tmp_path / "b.onnx")), [load_target(WS)])[0]
    assert {layer.name for layer in head.layers} != {layer.name for layer in base.layers}
    diff = diff_runs(base, head)
    assert {change.status for change in diff.layers} == {"unchanged"}
    assert head.layer("v2_relu2").fused_into == "v2_conv2"  # type: ignore[union-attr]


def test_profile_no_fusion_flag_gives_layer_by_layer_figures(tmp_path: Path) -> None:
    path = str(save(residual_block(), tmp_path / "block.onnx"))
    runner = CliRunner()
    fused = runner.invoke(cli, ["profile", path, "-t", WS, "--format", "json"])
    alone = runner.invoke(cli, ["profile", path, "-t", WS, "--format", "json", "--no-fusion"])
    assert fused.exit_code == 0 and alone.exit_code == 0, fused.output + alone.output
    fused_layers = json.loads(fused.stdout)["targets"][0]["layers"]
    alone_layers = json.loads(alone.stdout)["targets"][0]["layers"]
    assert [layer["fused_into"] for layer in fused_layers] == [
        "", "conv1", "conv1", "", "conv2", "conv2", "conv2"]
    assert all(layer["fused_into"] == "" and not layer["fused_ops"] for layer in alone_layers)
    table = runner.invoke(cli, ["profile", path, "-t", WS])
    # the last cells are bound and latency, which is a number and a unit ("1.23 us")
    bounds = [line.split()[-3] for line in table.stdout.splitlines() if len(line.split()) > 3]
    assert bounds.count("fusion-member") == 5 and "compute+" in bounds
    assert ("fused: 5 layers run inside 2 groups as the target declares (--no-fusion: layer by "
            "layer): conv1+BatchNormalization+Relu, conv2+BatchNormalization+Add+Relu"
            ) in table.stdout
    rows = list(csv.DictReader(io.StringIO(
        runner.invoke(cli, ["profile", path, "-t", WS, "--format", "csv"]).stdout)))
    assert rows[3]["fused_ops"] == "BatchNormalization;Add;Relu" and rows[6]["fused_into"] == "conv2"


def test_html_and_markdown_name_the_fused_group(tmp_path: Path) -> None:
    from gate.report.html_tables import layer_table
    from gate.report.markdown import render
    from tests.recordkit import entry, result

    target = load_target(WS)
    head = analyse(str(save(residual_block(), tmp_path / "h.onnx")), [target])[0]
    assert "(conv2+BatchNormalization+Add+Relu)" in layer_table(entry(head))
    assert "(in conv2)" in layer_table(entry(head))
    base = analyse(str(save(residual_block(), tmp_path / "b.onnx")), [target], fusion=False)[0]
    text = render(result(entry(head, base)))
    assert "Conv (conv2+BatchNormalization+Add+Relu)" in text  # its latency changed with fusion


def test_a_chain_runs_through_the_quantize_dequantize_pairs_of_a_qdq_export(
        tmp_path: Path) -> None:
    # A QDQ export (ONNX operator spec: QuantizeLinear -> DequantizeLinear around each
    # conv) of the residual block: the profile costs the Q/DQ pairs as nothing; a group
    # runs through them and fuses the same ops as in the float model deployed at int8,
    # which then costs the same.
    from gate.synth.forms import quantize

    qdq = _profile(quantize(residual_block(), "qdq"), tmp_path)
    target = load_target(WS)
    groups = _plan(qdq, target)
    assert groups == {
        "conv1": ["c1.q.quantize", "c1.q.dequantize", "bn1", "relu1"],
        "conv2": ["c2.q.quantize", "c2.q.dequantize", "bn2", "add", "relu2"]}
    assert {layer.role for layer in qdq.layers if layer.name.startswith("c1.q.")} == {"qdq-absorbed"}
    at_int8 = _profile(residual_block(), tmp_path, "int8")
    for fusion in (True, False):
        a, b = cost_model(at_int8, target, fusion=fusion), cost_model(qdq, target, fusion=fusion)
        assert b.latency_s == pytest.approx(a.latency_s, rel=0.01), fusion
        assert b.act_dram_bytes == a.act_dram_bytes
    assert cost_model(qdq, target).latency_s < cost_model(qdq, target, fusion=False).latency_s
