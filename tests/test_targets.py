"""Tests for target profiles: YAML loading and validation, the built-in targets, ``roofgate targets``."""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from gate.cli import cli
from gate.errors import ConfigError, InputError
from gate.targets import builtin_target_names, builtin_target_yaml, load_target, load_targets
from gate.targets.loader import parse_target_bytes

MINIMAL = """\
name: my-npu
description: a user's own target
clock: 1 GHz
array:
  rows: 32
  cols: 16
  dataflow: output-stationary
  precisions:
    int8: {macs_per_pe_per_cycle: 2, energy_per_mac: 0.1 pJ}
    float16: {macs_per_pe_per_cycle: 1, energy_per_mac: 0.5 pJ}
buffers:
  unified: 1 MiB
dram:
  bandwidth: 25.6 GB/s
energy:
  buffer_per_byte: 1 pJ
  noc_per_byte: 0.1 pJ
  dram_per_byte: 40 pJ
  static_power: 50 mW
layer_overhead: 3 us
vector_unit:
  ops_per_cycle: 64
  energy_per_op: 0.5 pJ
host:
  ops_per_cycle: 8
  clock: 2 GHz
  energy_per_op: 10 pJ
  layer_overhead: 40 us
placement:
  Softmax: host
  com.example:FancyOp: vector
weights_resident: true
"""


def load_text(text: str, name: str = "mine.yaml") -> object:
    return parse_target_bytes(text.encode(), name)


def problems_of(text: str) -> list[str]:
    with pytest.raises(ConfigError) as caught:
        load_text(text)
    return caught.value.problems


# ------------------------------------------------------------------ a user's file

def test_user_file_loads_with_units_converted() -> None:
    target = load_text(MINIMAL)
    assert target.name == "my-npu" and target.source == "mine.yaml"
    assert target.clock_hz == 1e9 and (target.pe_rows, target.pe_cols) == (32, 16)
    assert target.unified_buffer_bytes == 1 << 20 and target.param_buffer_bytes == 0
    assert target.dram_bytes_per_s == pytest.approx(25.6e9)
    assert list(target.precisions) == ["int8", "fp16"]  # 'float16' is spelled canonically
    assert target.precisions["int8"].mac_energy_j == pytest.approx(0.1e-12)
    assert target.peak_flops_per_s("int8") == pytest.approx(2 * 512 * 2 * 1e9)
    assert target.static_power_w == pytest.approx(0.05)
    assert target.layer_overhead_s == pytest.approx(3e-6)
    assert target.vector is not None and target.vector.clock_hz == 1e9  # defaults to the clock
    assert target.host is not None and target.host.ops_per_s == pytest.approx(16e9)
    assert dict(target.placement) == {"Softmax": "host", "com.example:FancyOp": "vector"}
    assert target.weights_resident is True
    assert target.engine_for("Softmax", "", has_gemms=False) == "host"
    assert target.engine_for("FancyOp", "com.example", has_gemms=False) == "vector"
    assert target.engine_for("Conv", "", has_gemms=True) == "array"


def test_load_target_reads_a_path(tmp_path: Path) -> None:
    path = tmp_path / "mine.yaml"
    path.write_text(MINIMAL)
    assert load_target(str(path)).source == str(path)
    with pytest.raises(ConfigError, match="file not found"):
        load_target(str(tmp_path / "missing.yaml"))


# ------------------------------------------------------------------ validation

def test_misspelled_key_names_file_line_key_and_suggestion() -> None:
    problems = problems_of(MINIMAL.replace("clock: 1 GHz", "clok: 1 GHz"))
    assert "mine.yaml:3: clok: unknown key (did you mean 'clock'?)" in problems
    assert any("clock: required key is missing" in p for p in problems)


def test_wrong_types_and_units_are_all_reported_at_once() -> None:
    text = (MINIMAL.replace("rows: 32", "rows: thirty-two")
            .replace("bandwidth: 25.6 GB/s", "bandwidth: 25.6 GHz")
            .replace("energy_per_mac: 0.1 pJ", "energy_per_mac: cheap"))
    problems = problems_of(text)
    assert any(p.startswith("mine.yaml:5: array.rows: expected a whole number") for p in problems)
    assert any(p.startswith("mine.yaml:14: dram.bandwidth: expected a quantity in B/s")
               for p in problems)
    assert any("array.precisions.int8.energy_per_mac: expected a quantity in J" in p
               for p in problems)
    assert len(problems) == 3


@pytest.mark.parametrize("old, new, expected", [
    ("dataflow: output-stationary", "dataflow: weight-stationery",
     ("array.dataflow: 'weight-stationery' is not one of weight-stationary, output-stationary, "
      "matrix-vector, vector (did you mean 'weight-stationary'?)")),
    ("    int8: {", "    int7: {", "array.precisions.int7: unknown precision 'int7' (did you mean"),
    ("  Softmax: host", "  Softmx: host",
     "placement.Softmx: 'Softmx' is not an ONNX op type (did you mean 'Softmax'?)"),
    ("  Softmax: host", "  Softmax: hots",
     "placement.Softmax: 'hots' is not one of array, vector, host (did you mean 'host'?)"),
    ("  unified: 1 MiB", "  unified: 1 MiB\n  parameter: 1 MiB", "buffers.unified: declare either"),
    ("  unified: 1 MiB", "  parameter: 1 MiB", "buffers.activation: declare both"),
    ("  unified: 1 MiB", "  unified: 1.5 B", "buffers.unified: must be a whole number of bytes"),
    ("  rows: 32", "  rows: 0", "array.rows: must be at least 1"),
    ("macs_per_pe_per_cycle: 2", "macs_per_pe_per_cycle: 0", "macs_per_pe_per_cycle: must be above"),
    ("  bandwidth: 25.6 GB/s", "  bandwidth: -3 GB/s", "dram.bandwidth: must be at least 0"),
    ("weights_resident: true", "weights_resident: maybe", "weights_resident: expected true or false"),
    ("name: my-npu", "name: my npu!", "name: 'my npu!' is not a valid target name"),
    ("host:\n  ops_per_cycle: 8", "hostt:\n  ops_per_cycle: 8", "hostt: unknown key (did you mean 'host'?)"),
])
def test_each_problem_names_its_key_and_what_to_do(old: str, new: str, expected: str) -> None:
    assert old in MINIMAL
    problems = problems_of(MINIMAL.replace(old, new))
    assert any(expected in p for p in problems), problems
    assert all(p.startswith("mine.yaml:") for p in problems)


def test_vector_placement_needs_a_vector_unit() -> None:
    text = MINIMAL.replace("vector_unit:\n  ops_per_cycle: 64\n  energy_per_op: 0.5 pJ\n", "")
    problem = next(p for p in problems_of(text) if "declares no vector_unit" in p)
    assert problem.startswith("mine.yaml:28: placement.com.example:FancyOp:")
    assert "add a 'vector_unit' section or place it on 'array' or 'host'" in problem


FUSION = """\
fusion:
  producers: [Conv, MatMul]
  fold: [BatchNormalization]
  epilogue: [Relu, Add]
  epilogue_engine: vector
  max_epilogue_ops: 1
  pad_into_conv: true
"""


def test_fusion_section_loads() -> None:
    target = load_text(MINIMAL + FUSION)
    fusion = target.fusion  # type: ignore[attr-defined]
    assert fusion.producers == {"Conv", "MatMul"} and fusion.fold == {"BatchNormalization"}
    assert fusion.epilogue == {"Relu", "Add"} and fusion.epilogue_engine == "vector"
    assert fusion.max_epilogue_ops == 1 and fusion.pad_into_conv
    assert load_text(MINIMAL).fusion is None  # type: ignore[attr-defined]


@pytest.mark.parametrize("old, new, expected", [
    ("epilogue: [Relu, Add]", "epilogue: [Relu7, Add]",
     "mine.yaml:36: fusion.epilogue: 'Relu7' is not an ONNX op type (did you mean 'Relu'?)"),
    ("epilogue: [Relu, Add]", "epilogue: [Relu, Softmax]",
     "mine.yaml:36: fusion.epilogue: 'Softmax' cannot be fused as epilogue"),
    ("producers: [Conv, MatMul]", "producers: [Conv, MatMull]",
     "mine.yaml:34: fusion.producers: 'MatMull' is not an ONNX op type (did you mean 'MatMul'?)"),
    ("fold: [BatchNormalization]", "fold: [BatchNormalisation]",
     "fusion.fold: 'BatchNormalisation' is not an ONNX op type (did you mean 'BatchNormalization'?)"),
    ("epilogue_engine: vector", "epilogue_engine: vectr",
     "fusion.epilogue_engine: 'vectr' is not one of output-path, vector (did you mean 'vector'?)"),
    ("  max_epilogue_ops: 1", "  max_epilog_ops: 1",
     "fusion.max_epilog_ops: unknown key (did you mean 'max_epilogue_ops'?)"),
    ("  max_epilogue_ops: 1", "  max_epilogue_ops: -1", "fusion.max_epilogue_ops: must be at least 0"),
])
def test_bad_fusion_sections_name_file_line_key_and_a_suggestion(old: str, new: str,
                                                                   expected: str) -> None:
    problems = problems_of(MINIMAL + FUSION.replace(old, new))
    assert any(expected in p for p in problems), problems
    assert all(p.startswith("mine.yaml:") for p in problems)


def test_fusion_epilogue_on_a_vector_unit_the_target_lacks_is_refused() -> None:
    text = (MINIMAL + FUSION).replace("vector_unit:\n  ops_per_cycle: 64\n  energy_per_op: 0.5 pJ\n",
                                      "").replace("  com.example:FancyOp: vector\n", "")
    expected = ("mine.yaml:33: fusion.epilogue_engine: 'vector' but the target declares no "
                "vector_unit; add a 'vector_unit' section or use 'output-path'")
    assert [p for p in problems_of(text) if "epilogue_engine" in p] == [expected]


def test_depthwise_and_grouped_convs_can_be_placed() -> None:
    text = MINIMAL.replace("  Softmax: host\n", "  Softmax: host\n  depthwise-conv: vector\n"
                                                 "  grouped-conv: array\n")
    target = load_text(text)
    assert target.placement["depthwise-conv"] == "vector"  # type: ignore[attr-defined]
    assert target.engine_for("Conv", "", True, "depthwise") == "vector"  # type: ignore[attr-defined]
    assert target.engine_for("Conv", "", True, "grouped") == "array"  # type: ignore[attr-defined]
    problems = problems_of(MINIMAL.replace("  Softmax: host\n", "  depthwise: vector\n"))
    assert ("mine.yaml:30: placement.depthwise: 'depthwise' is not an ONNX op type (did you mean "
            "'depthwise-conv'?)") in problems[0]
    no_vector = text.replace("vector_unit:\n  ops_per_cycle: 64\n  energy_per_op: 0.5 pJ\n", "")
    assert any(p.startswith("mine.yaml:28: placement.depthwise-conv: placed on 'vector' but the "
                            "target declares no vector_unit") for p in problems_of(no_vector))


def test_yaml_syntax_errors_and_non_mappings_fail_cleanly() -> None:
    assert "YAML syntax error" in problems_of("name: [unclosed\n")[0]
    assert "mapping of keys at the top level" in " ".join(problems_of("- just\n- a list\n"))


# ------------------------------------------------------------------ built-ins

def test_there_are_four_builtins_each_named_like_its_file() -> None:
    names = builtin_target_names()
    assert names == ["mv-8x8-near-mem", "os-16x16-512kib", "vec-dsp-128", "ws-64x64-4mib"]
    for name in names:
        target = load_target(name)
        assert target.name == name and target.source == "builtin"
        assert "fictional" in target.description
        assert target.host is not None and target.precisions


def test_builtin_key_figures_match_their_descriptions() -> None:
    large = load_target("ws-64x64-4mib")  # sized like a phone-class edge accelerator
    assert (large.dataflow, large.pe_rows, large.pe_cols) == ("weight-stationary", 64, 64)
    # 2 x 4096 PEs x 0.5 fp16 MAC x 800 MHz, the figure its file states
    assert large.peak_flops_per_s("fp16") == pytest.approx(2 * 4096 * 0.5 * 800e6)
    assert large.param_buffer_bytes == 4 << 20 and large.activation_buffer_bytes == 3 << 20
    assert 25e9 <= large.dram_bytes_per_s <= 50e9  # LPDDR-class
    small = load_target("os-16x16-512kib")
    assert small.dataflow == "output-stationary" and small.unified_buffer_bytes == 512 << 10
    near = load_target("mv-8x8-near-mem")
    assert near.dataflow == "matrix-vector" and near.dram_bytes_per_s > 3 * large.dram_bytes_per_s
    assert near.param_capacity_bytes < small.unified_buffer_bytes
    dsp = load_target("vec-dsp-128")
    assert dsp.dataflow == "vector" and dsp.pe_count == 128


def test_unknown_target_name_lists_the_builtins() -> None:
    with pytest.raises(InputError, match=r"unknown target 'ws-64x64'.*did you mean "
                                         r"'ws-64x64-4mib'.*mv-8x8-near-mem, os-16x16-512kib"):
        load_target("ws-64x64")


def test_two_targets_with_one_name_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "copy.yaml"
    path.write_text(builtin_target_yaml("vec-dsp-128"))
    with pytest.raises(InputError, match="two targets are named 'vec-dsp-128'"):
        load_targets(["vec-dsp-128", str(path)])
    assert [t.name for t in load_targets(["vec-dsp-128", "ws-64x64-4mib"])] == [
        "vec-dsp-128", "ws-64x64-4mib"]


# ------------------------------------------------------------------ CLI

def test_targets_command_lists_every_builtin_with_key_figures() -> None:
    result = CliRunner().invoke(cli, ["targets"])
    assert result.exit_code == 0, result.output
    for name in builtin_target_names():
        assert name in result.output
    assert "3.28 TFLOP/s fp16" in result.output  # 2 x 4096 x 0.5 x 800 MHz
    assert "4.00 MiB param + 3.00 MiB act" in result.output
    assert "512 KiB unified" in result.output
    assert "34.0 GB/s" in result.output and "weight-stationary" in result.output


def test_targets_command_lists_user_files_and_refuses_broken_ones(tmp_path: Path) -> None:
    good = tmp_path / "mine.yaml"
    good.write_text(MINIMAL)
    result = CliRunner().invoke(cli, ["targets", "--file", str(good)])
    assert result.exit_code == 0 and "my-npu" in result.output
    bad = tmp_path / "bad.yaml"
    bad.write_text(MINIMAL.replace("clock: 1 GHz", "clock: fast"))
    result = CliRunner().invoke(cli, ["targets", "--file", str(bad)])
    assert result.exit_code == 2
    assert f"{bad}:3: clock: expected a quantity in Hz" in result.output
    assert "Traceback" not in result.output


def test_targets_show_prints_yaml_that_loads_back_to_the_same_profile(tmp_path: Path) -> None:
    result = CliRunner().invoke(cli, ["targets", "show", "os-16x16-512kib"])
    assert result.exit_code == 0
    copy = tmp_path / "copy.yaml"
    copy.write_text(result.output)
    reloaded = load_target(str(copy))
    assert reloaded == load_target(str(copy))
    from dataclasses import replace
    assert replace(reloaded, source="builtin") == load_target("os-16x16-512kib")
    missing = CliRunner().invoke(cli, ["targets", "show", "os-16x16"])
    assert missing.exit_code == 2 and "did you mean 'os-16x16-512kib'" in missing.output


def test_targets_show_prints_a_user_file_after_checking_it(tmp_path: Path) -> None:
    good = tmp_path / "mine.yaml"
    good.write_text(MINIMAL)
    result = CliRunner().invoke(cli, ["targets", "show", str(good)])
    assert result.exit_code == 0 and result.output == MINIMAL
    bad = tmp_path / "bad.yaml"
    bad.write_text(MINIMAL.replace("rows: 32", "rowz: 32"))
    result = CliRunner().invoke(cli, ["targets", "show", str(bad)])
    assert result.exit_code == 2 and "rowz: unknown key (did you mean 'rows'?)" in result.output
