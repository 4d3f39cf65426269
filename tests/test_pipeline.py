"""The pipeline: analyse once for all targets, judge pairs, diffs and evaluates records."""

from __future__ import annotations

import textwrap
from datetime import date
from math import prod

import onnx
import pytest

from gate import profile
from gate.errors import InputError, RoofgateError
from gate.jobs import analyse
from gate.judge import judge
from gate.model import loader
from gate.policy import load_policy
from gate.result import FAIL, PASS, WAIVED, ModelError
from gate.synth.builder import save_model
from gate.synth.scenario import SPECIES_PR_LAST_WIDTH, species
from gate.targets import load_target
from tests.recordkit import layer, run

TARGETS = ("ws-64x64-4mib", "os-16x16-512kib")


@pytest.fixture(scope="module")
def species_path(tmp_path_factory) -> str:
    path = tmp_path_factory.mktemp("models") / "species.onnx"
    save_model(species(), path)
    return str(path)


def _policy(tmp_path, body: str):
    path = tmp_path / "policy.yaml"
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return load_policy(path)


def _reference_macs(path: str) -> int:
    """MACs of Conv and Gemm layers from onnx shape inference (independent of roofgate):
    Conv = output elements x (C_in / group) x kernel area; Gemm = M x K x N
    (ONNX operator spec, Conv and Gemm)."""
    model = onnx.shape_inference.infer_shapes(onnx.load(path, load_external_data=False))
    shapes = {v.name: [d.dim_value for d in v.type.tensor_type.shape.dim]
              for v in (*model.graph.value_info, *model.graph.input, *model.graph.output)}
    shapes.update({t.name: list(t.dims) for t in model.graph.initializer})
    total = 0
    for node in model.graph.node:
        if node.op_type == "Conv":
            weight = shapes[node.input[1]]  # [C_out, C_in / group, kh, kw]
            total += prod(shapes[node.output[0]]) * prod(weight[1:])
        elif node.op_type == "Gemm":
            a, b = shapes[node.input[0]], shapes[node.input[1]]
            trans_b = any(attr.name == "transB" and attr.i for attr in node.attribute)
            total += a[0] * a[1] * (b[0] if trans_b else b[1])
    return total


def test_analyse_gives_one_record_per_target_named_as_shown(species_path) -> None:
    targets = [load_target(name) for name in TARGETS]
    records = analyse(species_path, targets, shown_path="models/trailcam/species.onnx")
    assert [r.key for r in records] == [("models/trailcam/species.onnx", t) for t in TARGETS]
    macs = _reference_macs(species_path)
    for record in records:
        assert record.metrics["macs"] == sum(l.metrics["macs"] for l in record.layers)
        # Conv + Gemm MACs equal the independent count (pooling/BN/ReLU carry no MACs).
        assert sum(l.metrics["macs"] for l in record.layers
                   if l.op_type in ("Conv", "Gemm")) == macs
    # Same profile, different targets: target-independent counts agree, costs differ.
    assert records[0].metrics["param_bytes"] == records[1].metrics["param_bytes"]
    assert records[0].metrics["latency_s"] != records[1].metrics["latency_s"]


def test_analyse_loads_and_profiles_once_for_all_targets(species_path, monkeypatch) -> None:
    calls = {"load": 0, "profile": 0}
    real_load, real_profile = loader.load_model, profile.profile_model

    def counting_load(*args, **kwargs):
        calls["load"] += 1
        return real_load(*args, **kwargs)

    def counting_profile(*args, **kwargs):
        calls["profile"] += 1
        return real_profile(*args, **kwargs)

    monkeypatch.setattr(loader, "load_model", counting_load)  # looked up where it is used
    monkeypatch.setattr(profile, "profile_model", counting_profile)
    analyse(species_path, [load_target(name) for name in TARGETS])
    assert calls == {"load": 1, "profile": 1}


def test_analyse_refuses_bad_input(tmp_path, species_path) -> None:
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"not a model")
    with pytest.raises(RoofgateError):
        analyse(str(bad), [load_target("ws-64x64-4mib")])
    target = load_target("ws-64x64-4mib")
    with pytest.raises(InputError, match="given twice"):
        analyse(species_path, [target, target])


def test_analyse_end_to_end_widened_stage_fails_the_buffer_rule(tmp_path) -> None:
    base_path, head_path = tmp_path / "base.onnx", tmp_path / "head.onnx"
    save_model(species(), base_path)
    save_model(species(last_width=SPECIES_PR_LAST_WIDTH), head_path)
    target = [load_target("ws-64x64-4mib")]
    base = analyse(str(base_path), target, shown_path="species.onnx")
    head = analyse(str(head_path), target, shown_path="species.onnx")
    policy = _policy(tmp_path, """
        version: 1
        name: t
        rules:
          - {id: fit, kind: fits_in_buffer, check: params, severity: error}
        """)
    result = judge(head, base, [policy], command="evaluate", today=date(2026, 12, 2))
    (entry,) = result.entries
    assert entry.status == FAIL and result.exit_code == 1
    (finding,) = [f for f in entry.verdicts[0].findings if f.status == FAIL]
    assert finding.layer == "stage4.block1.conv2"
    changed = {c.head_name: c for c in entry.diff.layers if c.status == "changed"}
    assert "stage4.block1.conv2" in changed and changed["stage4.block1.conv2"].matched_by == "name"


def _limit_policy(tmp_path, waiver: str = ""):
    body = textwrap.dedent("""
        version: 1
        name: limits
        rules:
          - {id: small-params, kind: metric_limit, metric: param_bytes, max: 1 KiB,
             level: layer, severity: error, remedy: shrink the layer}
        """) + textwrap.dedent(waiver)
    return _policy(tmp_path, body)


def test_judge_pairs_by_model_and_target_and_sorts(tmp_path) -> None:
    policy = _limit_policy(tmp_path)
    head = [run("b.onnx"), run("a.onnx", "t2"), run("a.onnx", "t1")]
    base = [run("a.onnx", "t1"), run("gone.onnx", "t1")]
    result = judge(head, base, [policy], command="evaluate", today=date(2026, 1, 1),
                   errors=[ModelError("z.onnx", "broken"), ModelError("c.onnx", "broken")])
    assert [e.key if hasattr(e, "key") else (e.model, e.target) for e in result.entries] == [
        ("a.onnx", "t1"), ("a.onnx", "t2"), ("b.onnx", "ws-64x64-4mib"),
        ("gone.onnx", "t1")]
    a1, a2, _, gone = result.entries
    assert a1.diff is not None and a1.base is not None
    assert a2.base is None and a2.diff is None  # new model x target: no diff
    assert gone.head is None and gone.verdicts == ()  # removed: nothing to judge
    assert [e.model for e in result.errors] == ["c.onnx", "z.onnx"]
    assert result.policies == (policy.path,) and result.exit_code == 2
    # "head/gemm" has 2048 parameter bytes, over 1 KiB: a failure naming the layer.
    assert a1.verdicts[0].status == FAIL
    assert [f.layer for f in a1.verdicts[0].findings] == ["head/gemm"]
    shuffled = judge(list(reversed(head)), list(reversed(base)), [policy], command="evaluate",
                     today=date(2026, 1, 1))
    assert [(e.model, e.target) for e in shuffled.entries] == [
        (e.model, e.target) for e in result.entries]


def test_waiver_expiry_on_a_fixed_clock(tmp_path) -> None:
    policy = _limit_policy(tmp_path, """
        waivers:
          - {rule: small-params, models: ["**"], layers: ["head/*"], reason: "tracked in #7",
             expires: 2027-01-31}
        """)
    head = [run("m.onnx")]
    on_the_day = judge(head, [], [policy], command="evaluate", today=date(2027, 1, 31))
    day_after = judge(head, [], [policy], command="evaluate", today=date(2027, 2, 1))
    (held,) = on_the_day.entries[0].verdicts
    (lapsed,) = day_after.entries[0].verdicts
    assert held.status == WAIVED and on_the_day.exit_code == 0
    assert held.findings[0].waiver_reason == "tracked in #7"
    assert lapsed.status == FAIL and day_after.exit_code == 1
    assert "expired on 2027-01-31" in lapsed.findings[0].message


def test_judge_without_policies_or_records() -> None:
    result = judge([], [], [], command="check", today=date(2026, 1, 1),
                   notes=["no models changed", "no models changed"])
    assert result.entries == () and result.notes == ("no models changed",)
    assert result.exit_code == 0 and not result.allow_errors


def test_judge_refuses_duplicate_records() -> None:
    with pytest.raises(InputError, match="appears twice"):
        judge([run(), run()], [], [], command="evaluate", today=date(2026, 1, 1))


def test_passing_rule_passes(tmp_path) -> None:
    policy = _limit_policy(tmp_path)
    small = run(layers=(layer("tiny", param_bytes=100),))
    result = judge([small], [], [policy], command="evaluate", today=date(2026, 1, 1))
    assert result.entries[0].verdicts[0].status == PASS and result.exit_code == 0
