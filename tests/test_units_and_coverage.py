"""Units are required, implausible figures are warned about, percentages read '10%', unmodelled
work is bounded from above, and a value exactly at a limit meets it.

CLI tests go through click's CliRunner and assert the exit code and the one-line message.
"""

from __future__ import annotations

from pathlib import Path

import onnx
import pytest
from click.testing import CliRunner
from onnx import TensorProto, helper

from gate.cli import cli
from gate.model.loader import load_model
from gate.ops import registry
from gate.policy.thresholds import above_maximum, below_minimum, regression_exceeds
from gate.profile import profile_model, unmodelled_work_bound
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from gate.targets import builtin_target_yaml
from gate.yamlconf import unit_suggestion
from tests.loadkit import save

TARGET = "ws-64x64-4mib"


def invoke(args: list[str]):
    return CliRunner().invoke(cli, args)


def fc_file(tmp_path: Path) -> Path:
    b = NetBuilder("fc", weights="external")
    b.output(b.gemm(b.input("x", [1, 64]), 32, name="fc"))
    save_model(b.build(), tmp_path / "m.onnx")
    return tmp_path / "m.onnx"


def target_with(tmp_path: Path, key: str, value: str) -> Path:
    """The built-in target's YAML with the first ``key: ...`` (block or inline) set to
    ``value``; comments dropped."""
    lines, done = [], False
    for line in builtin_target_yaml(TARGET).splitlines():
        line = line.split("#", 1)[0].rstrip()
        if not done and f"{key}:" in line:
            head, _, rest = line.partition(f"{key}:")
            tail = "}" if rest.rstrip().endswith("}") and "," not in rest else ""
            after = rest.split(",", 1)[1] if "," in rest else ""
            line = f"{head}{key}: {value}" + (f",{after}" if after else tail)
            done = True
        lines.append(line.replace(f"name: {TARGET}", "name: custom"))
    path = tmp_path / "t.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# --- units required ---------------------------------------------------------------------

@pytest.mark.parametrize(("key", "bare", "suggestion"), [
    ("energy_per_mac", "0.6", "0.6 pJ"),
    ("bandwidth", "25.6", "25.6 GB/s"),
    ("clock", "800", "800 MHz"),
    ("dram_per_byte", "20", "20 pJ"),
])
def test_a_target_figure_without_its_unit_is_refused_with_a_suggestion(
        tmp_path: Path, key: str, bare: str, suggestion: str) -> None:
    target = target_with(tmp_path, key, bare)
    result = invoke(["profile", str(fc_file(tmp_path)), "-t", str(target)])
    assert result.exit_code == 2, result.output
    (line,) = result.stderr.strip().splitlines()
    assert f"{key}: a bare number needs its unit (did you mean '{suggestion}'?)" in line, line
    assert str(target) in line


@pytest.mark.parametrize(("rule", "suggestion"), [
    ("{id: t, kind: max_latency, max: 5}", "5 ms"),
    ("{id: e, kind: max_energy, max: 2}", "2 mJ"),
    ("{id: p, kind: max_param_dram, max: 4}", "4 MiB"),
])
def test_a_policy_limit_without_its_unit_is_refused(tmp_path: Path, rule: str,
                                                    suggestion: str) -> None:
    policy = tmp_path / "p.yaml"
    policy.write_text(f"version: 1\nname: p\nrules:\n  - {rule}\n", encoding="utf-8")
    result = invoke(["evaluate", str(fc_file(tmp_path)), "-t", TARGET, "-p", str(policy)])
    assert result.exit_code == 2
    (line,) = result.stderr.strip().splitlines()
    assert f"rules[0].max: a bare number needs its unit (did you mean '{suggestion}'?)" in line


def test_zero_needs_no_unit_and_counts_need_none(tmp_path: Path) -> None:
    target = target_with(tmp_path, "static_power", "0")
    policy = tmp_path / "p.yaml"
    policy.write_text("version: 1\nname: p\nrules:\n  - {id: m, kind: metric_limit, metric: macs, "
                      "max: 5000000}\n", encoding="utf-8")
    result = invoke(["evaluate", str(fc_file(tmp_path)), "-t", str(target), "-p", str(policy)])
    assert result.exit_code == 0, result.output


def test_unit_suggestion_lands_in_the_typical_range() -> None:
    assert unit_suggestion(0.6, "J", (1e-16, 1e-10)) == "0.6 pJ"
    assert unit_suggestion(4, "B") == "4 MiB"
    assert unit_suggestion(5, "s") == "5 ms"
    assert unit_suggestion(800, "Hz") == "800 MHz"


# --- plausibility warnings ----------------------------------------------------------------

def test_a_figure_far_outside_edge_ranges_is_warned_about_in_every_output(tmp_path: Path) -> None:
    # 0.6 nJ per MAC: a thousand times a 32-bit float multiply at 45 nm (Horowitz, ISSCC 2014,
    # 3.7 pJ; from memory), so almost surely a wrong unit.
    target = target_with(tmp_path, "energy_per_mac", "0.6 uJ")
    result = invoke(["profile", str(fc_file(tmp_path)), "-t", str(target)])
    assert result.exit_code == 0, result.output
    assert "energy_per_mac: 6e-07 J is far outside what edge accelerators use" in result.stderr
    out = tmp_path / "r.json"
    policy = tmp_path / "p.yaml"
    policy.write_text("version: 1\nname: p\nrules:\n  - {id: f, kind: fits_in_buffer}\n")
    judged = invoke(["evaluate", str(fc_file(tmp_path)), "-t", str(target), "-p", str(policy),
                     "--json", str(out)])
    assert judged.exit_code == 0 and "far outside" in out.read_text()


# --- percentages -------------------------------------------------------------------------------

@pytest.mark.parametrize("pct", ["10", "'10%'", "10.0%"])
def test_a_regression_percent_reads_10_and_10_percent_alike(tmp_path: Path, pct: str) -> None:
    policy = tmp_path / "p.yaml"
    policy.write_text("version: 1\nname: p\nrules:\n  - {id: r, kind: max_regression, "
                      f"metric: latency_s, max_increase_pct: {pct}}}\n", encoding="utf-8")
    from gate.policy import load_policy

    assert load_policy(str(policy)).rules[0].max_change_pct == pytest.approx(10.0)


# --- limits meet values exactly at them ------------------------------------------------------

@pytest.mark.parametrize(("value", "limit", "below", "above"), [
    (1 - 38 / 40, 0.05, False, False),  # 2 of 40 unmodelled: 0.050000000000000044 in floats
    (0.05 + 1e-6, 0.05, False, True),
    (0.05 - 1e-6, 0.05, True, False),
    (0.0, 0.0, False, False),
])
def test_limits_compare_with_a_tolerance(value: float, limit: float, below: bool,
                                         above: bool) -> None:
    assert below_minimum(value, limit) is below
    assert above_maximum(value, limit) is above


def test_a_regression_exactly_at_its_percent_limit_passes() -> None:
    assert not regression_exceeds(1.0, 1.1, higher_is_better=False, max_pct=10.0, max_abs=None)
    assert regression_exceeds(1.0, 1.1001, higher_is_better=False, max_pct=10.0, max_abs=None)


def _relu_chain_with_custom_ops(count: int, custom: int) -> onnx.ModelProto:
    """``count`` nodes on [1, 16]: ``custom`` custom-domain ops (unmodelled), Relu otherwise."""
    nodes = []
    for k in range(count):
        src, dst = ("x" if k == 0 else f"t{k - 1}"), f"t{k}"
        if k < custom:
            nodes.append(helper.make_node("Opaque", [src], [dst], name=f"c{k}",
                                          domain="example.custom"))
        else:
            nodes.append(helper.make_node("Relu", [src], [dst], name=f"r{k}"))
    graph = helper.make_graph(
        nodes, "chain", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 16])],
        [helper.make_tensor_value_info(f"t{count - 1}", TensorProto.FLOAT, [1, 16])],
        value_info=[helper.make_tensor_value_info(f"t{k}", TensorProto.FLOAT, [1, 16])
                    for k in range(count - 1)])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("example.custom", 1)])


@pytest.mark.parametrize(("custom", "code"), [(2, 0), (3, 1)])
def test_two_of_forty_nodes_meet_a_five_percent_node_limit(tmp_path: Path, custom: int,
                                                           code: int) -> None:
    path = save(_relu_chain_with_custom_ops(40, custom), tmp_path / "chain.onnx")
    policy = tmp_path / "p.yaml"
    policy.write_text("version: 1\nname: p\nrules:\n  - {id: c, kind: max_unmodelled, "
                      "max_node_share: 5%}\n", encoding="utf-8")
    result = invoke(["evaluate", str(path), "-t", TARGET, "-p", str(policy)])
    assert result.exit_code == code, result.output


# --- pessimistic coverage -------------------------------------------------------------------

def _one_op(op_type: str, inputs: dict[str, list[int]], output: list[int],
            **attrs: object) -> onnx.ModelProto:
    node = helper.make_node(op_type, list(inputs), ["y"], name="op", **attrs)
    graph = helper.make_graph(
        [node], "one", [helper.make_tensor_value_info(n, TensorProto.FLOAT, s)
                        for n, s in inputs.items()],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, output)])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


CASES = {
    # MACs of each op per the ONNX operator specification: MatMul [M,K]x[K,N] -> M*K*N;
    # Conv -> N*Cout*Hout*Wout*Cin*kh*kw; Gemm -> M*K*N.
    "MatMul": (_one_op("MatMul", {"a": [1, 128, 64], "b": [64, 256]}, [1, 128, 256]),
               128 * 64 * 256),
    "Conv": (_one_op("Conv", {"x": [1, 16, 32, 32], "w": [32, 16, 3, 3]}, [1, 32, 30, 30]),
             32 * 30 * 30 * 16 * 3 * 3),
    "Gemm": (_one_op("Gemm", {"a": [8, 512], "b": [512, 1000]}, [8, 1000]), 8 * 512 * 1000),
}


@pytest.mark.parametrize("op_type", sorted(CASES))
def test_the_unmodelled_work_bound_is_never_below_the_real_work(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, op_type: str) -> None:
    model, spec_macs = CASES[op_type]
    path = save(model, tmp_path / f"{op_type}.onnx")
    counted = profile_model(load_model(str(path), {}))
    assert counted.total_macs == spec_macs  # the modelled count agrees with the spec formula
    monkeypatch.setitem(registry._REGISTRY, ("", op_type), _unmodelled)
    blind = profile_model(load_model(str(path), {}))
    (layer,) = blind.layers
    assert not layer.modelled
    assert unmodelled_work_bound(layer) >= spec_macs
    assert blind.coverage.work_unmodelled_estimate >= spec_macs
    # The old proxy (output elements) understated it by orders of magnitude:
    outputs = 1
    for dim in layer.output_shapes[0] or ():
        outputs *= int(dim)
    assert outputs < spec_macs / 10


def _unmodelled(*args: object, **kwargs: object) -> object:
    raise registry.Unmodelled("simulated: no cost function")


def test_an_unmodelled_attention_cannot_hide_behind_a_tiny_share(tmp_path: Path) -> None:
    """A custom attention op over a 512-token sequence next to a small modelled Gemm: the
    work share must say that most of the work is unseen (attention over L tokens of width
    d does about 2 * L^2 * d MACs: 33.5 M here, against 4 M in the Gemm)."""
    L, d = 512, 64
    nodes = [helper.make_node("Gemm", ["x", "w"], ["h"], name="proj"),
             helper.make_node("Attn", ["h", "h", "h"], ["y"], name="attn", domain="example.custom")]
    graph = helper.make_graph(
        nodes, "attn", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [L, 128])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [L, d])],
        initializer=[helper.make_tensor("w", TensorProto.FLOAT, [128, d], [0.0] * (128 * d))],
        value_info=[helper.make_tensor_value_info("h", TensorProto.FLOAT, [L, d])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                    helper.make_opsetid("example.custom", 1)])
    path = save(model, tmp_path / "attn.onnx")
    coverage = profile_model(load_model(str(path), {})).coverage
    assert coverage.work_modelled == L * 128 * d
    assert coverage.work_share < (L * 128 * d) / (L * 128 * d + 2 * L * L * d)
