"""Rule evaluation: threshold functions, every rule kind, scoping, waivers, verdict status.

Records are built by hand (small round numbers, fictional scenario names) so each
expected value can be checked on paper. Byte figures in messages use IEC 80000-13
binary prefixes (1 MiB = 2**20 bytes); relative change is (head - base) / base
(common practice, no source).
"""

from __future__ import annotations

import textwrap
from dataclasses import replace
from datetime import date
from pathlib import Path
from typing import Any

import pytest

from gate.errors import InputError
from gate.jobs import analyse
from gate.judge import judge
from gate.policy import (
    allow_unanalysable,
    evaluate,
    evaluate_all,
    load_policies,
    unused_waivers,
)
from gate.policy.load import read_policy
from gate.policy.spec import Policy
from gate.policy.thresholds import (
    above_maximum,
    below_minimum,
    regression_bound,
    regression_exceeds,
    unmodelled_share,
    waiver_active,
)
from gate.records import LAYER_METRICS, MODEL_METRICS, LayerRecord, RunRecord, UnmodelledRecord
from gate.result import FAIL, PASS, WAIVED, LayerChange, RunDiff, Verdict
from gate.synth.scenario import SPECIES_PATH, WAKEWORD_PATH, write_scenario
from gate.targets import load_targets
from gate.yamlconf import parse_yaml_bytes

MiB = 2**20
TODAY = date(2026, 12, 2)
SPECIES = SPECIES_PATH
TARGET = "ws-64x64-4mib"


# --- hand-made records ---------------------------------------------------------------

def _layer(name: str, op_type: str = "Conv", *, engine: str = "array", modelled: bool = True,
           params_fit: bool = True, activations_fit: bool = True, **metrics: Any) -> LayerRecord:
    values: dict[str, int | float] = {m: 0 for m in LAYER_METRICS}
    values.update({"macs": 2_000_000, "utilization": 0.5, "latency_s": 1e-3, "energy_j": 1e-4,
                   "param_bytes": 64 * 1024, "input_bytes": 1024, "output_bytes": 1024})
    values.update(metrics)
    return LayerRecord(name=name, op_type=op_type, signature=f"{op_type}(x)->(y)", engine=engine,
                       bound="compute", modelled=modelled, unmodelled_reason="",
                       params_fit=params_fit, activations_fit=activations_fit, metrics=values)


def _run(*layers: LayerRecord, model: str = SPECIES, target: str = TARGET,
         unmodelled: tuple[UnmodelledRecord, ...] = (), **metrics: Any) -> RunRecord:
    layers = layers or (_layer("conv1"), _layer("relu1", "Relu", engine="vector", macs=0,
                                                utilization=0.0, param_bytes=0))
    values: dict[str, int | float] = {m: 0 for m in MODEL_METRICS}
    for name in ("macs", "latency_s", "energy_j", "param_bytes", "param_dram_bytes"):
        values[name] = sum(layer.metrics[name] for layer in layers)
    values.update({"layers": len(layers), "utilization": 0.5, "coverage_node_share": 1.0,
                   "coverage_work_share": 1.0})
    values.update(metrics)
    figures = {"param_buffer_bytes": 1 * MiB, "activation_buffer_bytes": 512 * 1024,
               "pe_count": 4096}
    return RunRecord(model=model, model_name="species", target=target, precision="int8",
                     metrics=values, target_figures=figures, layers=tuple(layers),
                     unmodelled=unmodelled)


def _policy(rules: str, waivers: str = "", top: str = "") -> Policy:
    text = textwrap.dedent(top) + "rules:\n" + textwrap.indent(textwrap.dedent(rules), "  ")
    if waivers:
        text += "\nwaivers:\n" + textwrap.indent(textwrap.dedent(waivers), "  ")
    doc = parse_yaml_bytes(text.encode(), "test.yaml")
    policy = read_policy(doc)
    doc.raise_if_problems()
    return policy


def _one(policy: Policy, head: RunRecord | None, base: RunRecord | None = None,
         diff: RunDiff | None = None, today: date = TODAY) -> Verdict:
    (verdict,) = evaluate(policy, head, base, diff, today=today)
    return verdict


# --- pure threshold functions ------------------------------------------------------------

@pytest.mark.parametrize(("value", "limit", "below", "above"), [
    (0.29, 0.30, True, False), (0.30, 0.30, False, False), (0.31, 0.30, False, True),
    (0, 0, False, False), (-1, 0, True, False), (MiB + 1, MiB, False, True),
])
def test_minimum_and_maximum_are_inclusive(value: float, limit: float, below: bool,
                                           above: bool) -> None:
    assert below_minimum(value, limit) is below
    assert above_maximum(value, limit) is above


REGRESSIONS = [
    # base, head, higher_is_better, max_pct, max_abs, exceeds
    (100.0, 110.0, False, 10.0, None, False),  # exactly at the limit passes
    (100.0, 110.1, False, 10.0, None, True),
    (100.0, 90.0, False, 0.0, None, False),  # an improvement never regresses
    (100.0, 100.0, False, 0.0, 0.0, False),
    (100.0, 100.0 + 1e-12, False, 0.0, None, False),  # float noise is not a change
    (1e-6, 2e-6, False, 10.0, 5e-6, False),  # +100% but under the absolute floor
    (1e-3, 2e-3, False, 10.0, 5e-6, True),  # past both limits
    (1e-3, 1.05e-3, False, 10.0, 1e-6, False),  # past the absolute limit only
    (100.0, 120.0, False, None, 15.0, True),
    (100.0, 110.0, False, None, 15.0, False),
    (0.0, 1.0, False, 50.0, None, True),  # from zero: any relative limit is exceeded
    (0.0, 1.0, False, 50.0, 2.0, False),
    (0.50, 0.40, True, 10.0, None, True),  # better higher: a 20% drop regresses
    (0.50, 0.46, True, 10.0, None, False),
    (0.50, 0.60, True, 0.0, None, False),  # better higher: a rise is an improvement
    (0.50, 0.44, True, None, 0.05, True),  # six points down, five allowed
]


@pytest.mark.parametrize(("base", "head", "higher", "pct", "absolute", "exceeds"), REGRESSIONS)
def test_regression_exceeds(base: float, head: float, higher: bool, pct: float | None,
                            absolute: float | None, exceeds: bool) -> None:
    assert regression_exceeds(base, head, higher_is_better=higher, max_pct=pct,
                              max_abs=absolute) is exceeds


def test_regression_needs_a_limit() -> None:
    with pytest.raises(ValueError):
        regression_exceeds(1.0, 2.0, higher_is_better=False, max_pct=None, max_abs=None)


@pytest.mark.parametrize(("base", "higher", "pct", "absolute", "bound"), [
    (100.0, False, 10.0, None, 110.0), (100.0, False, None, 5.0, 105.0),
    (100.0, False, 10.0, 25.0, 125.0),  # both must be exceeded: the looser binds
    (0.5, True, 10.0, None, 0.45), (0.5, True, None, 0.05, 0.45),
])
def test_regression_bound_is_the_worst_allowed_value(base: float, higher: bool,
                                                     pct: float | None, absolute: float | None,
                                                     bound: float) -> None:
    assert regression_bound(base, higher_is_better=higher, max_pct=pct,
                            max_abs=absolute) == pytest.approx(bound)
    # The bound itself passes; a step past it fails (consistency of the two functions).
    step = -1e-6 if higher else 1e-6
    assert not regression_exceeds(base, bound, higher_is_better=higher, max_pct=pct,
                                  max_abs=absolute)
    assert regression_exceeds(base, bound + step, higher_is_better=higher, max_pct=pct,
                              max_abs=absolute)


@pytest.mark.parametrize(("coverage", "share"), [(1.0, 0.0), (0.75, 0.25), (0.0, 1.0), (1.2, 0.0)])
def test_unmodelled_share(coverage: float, share: float) -> None:
    assert unmodelled_share(coverage) == pytest.approx(share)


@pytest.mark.parametrize(("expires", "today", "active"), [
    ("2026-12-02", "2026-12-01", True), ("2026-12-02", "2026-12-02", True),  # through the day
    ("2026-12-02", "2026-12-03", False), ("2026-01-31", "2026-12-02", False),
])
def test_waiver_active(expires: str, today: str, active: bool) -> None:
    assert waiver_active(expires, today) is active


# --- every rule kind: (rules, head, base, status, failing layers, message parts) ----------

_WIDE = _layer("stage4/conv", param_bytes=int(1.3 * MiB), params_fit=False)
_SPILL = _layer("stem/conv", input_bytes=400 * 1024, output_bytes=300 * 1024,
                activations_fit=False)
_IDLE = _layer("dw/conv", utilization=0.124)
_TINY_IDLE = _layer("tiny/conv", utilization=0.01, macs=1000)
_OFF_ARRAY = _layer("add", "Add", engine="vector", utilization=0.0, macs=0)
_UNKNOWN = _layer("custom", "FancyOp", engine="none", modelled=False, utilization=0.0, macs=0)

KIND_CASES = [
    ("fits params fails with the CEO's example sentence",
     "- {id: fit, kind: fits_in_buffer, check: params}",
     _run(_layer("conv1"), _WIDE), None, FAIL, ["stage4/conv"],
     [("Layer 'stage4/conv' (Conv): parameters 1.30 MiB exceed the 1.00 MiB parameter buffer "
      "of ws-64x64-4mib: prune the weights, split the layer")]),
    ("fits activations fails",
     "- {id: fit, kind: fits_in_buffer, check: activations}",
     _run(_SPILL, _WIDE), None, FAIL, ["stem/conv"],
     ["input and output activations 700 KiB exceed the 512 KiB activation buffer",
      "tile the layer"]),
    ("fits both finds both",
     "- {id: fit, kind: fits_in_buffer}", _run(_SPILL, _WIDE), None, FAIL,
     ["stem/conv", "stage4/conv"], []),
    ("fits passes",
     "- {id: fit, kind: fits_in_buffer}", _run(), None, PASS, [], []),
    ("layer utilization skips tiny, off-array and unmodelled layers",
     "- {id: u, kind: min_utilization, level: layer, min: 30%, min_layer_macs: 1M}",
     _run(_layer("conv1"), _IDLE, _TINY_IDLE, _OFF_ARRAY, _UNKNOWN), None, FAIL, ["dw/conv"],
     ["Layer 'dw/conv' (Conv): utilization 12.4% is below the 30.0% minimum", "PE array"]),
    ("layer utilization with a zero MAC threshold still skips MAC-free layers",
     "- {id: u, kind: min_utilization, level: layer, min: 30%, min_layer_macs: 0}",
     _run(_layer("conv1"), _TINY_IDLE, _OFF_ARRAY), None, FAIL, ["tiny/conv"], []),
    ("model utilization fails",
     "- {id: u, kind: min_utilization, min: 0.6}", _run(utilization=0.5), None, FAIL, [None],
     ["Model: utilization 50.0% is below the 60.0% minimum"]),
    ("model utilization on a target without array layers is not judged",
     "- {id: u, kind: min_utilization, min: 0.6}", _run(_OFF_ARRAY, utilization=0.0), None,
     PASS, [], []),
    ("param DRAM per model fails and lists the largest layers",
     "- {id: d, kind: max_param_dram, max: 1 MiB}",
     _run(_layer("a", param_dram_bytes=MiB), _layer("b", param_dram_bytes=MiB // 2)), None,
     FAIL, [None],
     [("Model: parameter DRAM traffic per inference 1.50 MiB exceeds the 1.00 MiB maximum "
      "(largest: a 1.00 MiB, b 512 KiB)")]),
    ("param DRAM per layer",
     "- {id: d, kind: max_param_dram, level: layer, max: 600 KiB}",
     _run(_layer("a", param_dram_bytes=MiB), _layer("b", param_dram_bytes=MiB // 2)), None,
     FAIL, ["a"], []),
    ("latency fails",
     "- {id: t, kind: max_latency, max: 1.5 ms}", _run(), None, FAIL, [None],
     [("Model: latency per inference 2.00 ms exceeds the 1.50 ms maximum (largest: conv1 "
      "1.00 ms, relu1 1.00 ms)")]),
    ("latency at the limit passes",
     "- {id: t, kind: max_latency, max: 2 ms}", _run(), None, PASS, [], []),
    ("energy fails",
     "- {id: e, kind: max_energy, max: 0.1 mJ}", _run(), None, FAIL, [None],
     ["energy per inference 200 uJ exceeds the 100 uJ maximum"]),
    ("unmodelled work share fails and names the ops",
     "- {id: c, kind: max_unmodelled, max_work_share: 5%}",
     _run(coverage_work_share=0.8, unmodelled=(UnmodelledRecord("FancyOp", "com.example", 2,
                                                                 "no cost function"),)),
     None, FAIL, [None],
     [("Model: 20.0% of the work is in ops roofgate cannot cost, above the 5.0% maximum "
      "(FancyOp x2: no cost function)")]),
    ("unmodelled node share",
     "- {id: c, kind: max_unmodelled, max_node_share: 0%, max_work_share: 50%}",
     _run(coverage_node_share=0.9, coverage_work_share=0.99), None, FAIL, [None],
     ["10.0% of the nodes"]),
    ("metric limit with min and max",
     "- {id: m, kind: metric_limit, level: layer, metric: act_dram_bytes, max: 1 MiB}",
     _run(_layer("a", act_dram_bytes=2 * MiB), _layer("b")), None, FAIL, ["a"],
     [("Layer 'a' (Conv): activation DRAM traffic [act_dram_bytes] 2.00 MiB exceeds the "
      "1.00 MiB maximum")]),
    ("metric limit minimum",
     "- {id: m, kind: metric_limit, metric: inferences_per_s, min: 1000}",
     _run(inferences_per_s=500.0), None, FAIL, [None], ["is below the"]),
    ("regression without baseline passes and says so",
     "- {id: r, kind: max_regression, metric: latency_s, max_increase_pct: 5}",
     _run(), None, PASS, [], []),
    ("model regression",
     "- {id: r, kind: max_regression, metric: latency_s, max_increase_pct: 5}",
     _run(_layer("conv1", latency_s=1.2e-3)), _run(_layer("conv1")), FAIL, [None],
     [("Model: latency [latency_s] 1.00 ms -> 1.20 ms against the baseline, worse by 200 us "
      "(+20.0%), beyond the allowed +5% (worst allowed 1.05 ms)")]),
    ("model regression better-higher metric",
     "- {id: r, kind: max_regression, metric: utilization, max_decrease_abs: 5%}",
     _run(utilization=0.40), _run(utilization=0.50), FAIL, [None], ["worse by 10.0 pp"]),
    ("model improvement is no regression",
     "- {id: r, kind: max_regression, metric: utilization, max_decrease_pct: 0}",
     _run(utilization=0.60), _run(utilization=0.50), PASS, [], []),
    ("layer regression by name without a diff, new layers ignored",
     "- {id: r, kind: max_regression, level: layer, metric: param_bytes, max_increase_pct: 10}",
     _run(_layer("a", param_bytes=200_000), _layer("b"), _layer("new", param_bytes=10 * MiB)),
     _run(_layer("a", param_bytes=100_000), _layer("b")), FAIL, ["a"],
     [("Layer 'a' (Conv): parameter size [param_bytes] 97.7 KiB -> 195 KiB against the "
      "baseline, worse by 97.7 KiB (+100%)")]),
]


@pytest.mark.parametrize(("label", "rules", "head", "base", "status", "layers", "parts"),
                         KIND_CASES, ids=[c[0] for c in KIND_CASES])
def test_rule_kinds(label: str, rules: str, head: RunRecord, base: RunRecord | None, status: str,
                    layers: list[str | None], parts: list[str]) -> None:
    verdict = _one(_policy(rules), head, base)
    assert verdict.status == status, verdict.summary
    assert [f.layer for f in verdict.findings] == layers
    assert all(f.status == FAIL for f in verdict.findings)
    text = " ".join(f.message for f in verdict.findings)
    for part in parts:
        assert part in text
    for finding in verdict.findings:  # a full sentence ending in (a part of) the remedy
        assert finding.message.endswith(".")
        assert finding.message.rsplit(": ", 1)[1].rstrip(".") in verdict.remedy
    assert verdict.summary and "\n" not in verdict.summary
    assert verdict.description


def test_layer_regression_follows_the_diff_through_a_rename() -> None:
    head = _run(_layer("backbone/conv_a", latency_s=3e-3), _layer("extra"))
    base = _run(_layer("conv_a", latency_s=1e-3))
    diff = RunDiff(SPECIES, TARGET, totals={}, layers=(
        LayerChange("changed", "conv_a", "backbone/conv_a", "Conv", "signature",
                    {"latency_s": (1e-3, 3e-3)}),
        LayerChange("added", None, "extra", "Conv", "", {}),
    ))
    policy = _policy("- {id: r, kind: max_regression, level: layer, metric: latency_s, "
                     "max_increase_pct: 50, layers: ['*conv*']}")
    verdict = _one(policy, head, base, diff)
    (finding,) = verdict.findings
    assert finding.layer == "backbone/conv_a" and finding.value == 3e-3
    assert finding.limit == pytest.approx(1.5e-3)
    assert "Layer 'backbone/conv_a' (Conv, was 'conv_a')" in finding.message
    assert verdict.summary.startswith("1 layer regressed in latency beyond +50%; worst: "
                                      "backbone/conv_a worse by 2.00 ms (+200%)")


def test_summary_names_the_count_and_the_worst_layer() -> None:
    head = _run(_layer("a", utilization=0.25), _layer("conv5", utilization=0.124), _layer("ok"))
    verdict = _one(_policy("- {id: u, kind: min_utilization, level: layer, min: 30%}"), head)
    assert verdict.summary == "2 layers below 30.0% utilization; worst: conv5 12.4%"
    passing = _one(_policy("- {id: u, kind: min_utilization, level: layer, min: 10%}"), head)
    assert passing.summary == "3 array layers with >= 1 MACs at or above 10.0% utilization"


def test_missing_metric_in_a_record_fails_closed() -> None:
    head = _run()
    broken = replace(head, metrics={k: v for k, v in head.metrics.items() if k != "latency_s"})
    with pytest.raises(InputError, match="has no metric 'latency_s'"):
        evaluate(_policy("- {id: t, kind: max_latency, max: 1 ms}"), broken, None, None,
                 today=TODAY)


def test_unmodelled_ops_are_grouped_by_reason_and_nodes_take_a_plural_verb() -> None:
    unbound = "symbolic dim 'seq' unbound: bind it with --dim seq=N"
    head = _run(coverage_node_share=0.0, coverage_work_share=0.0, unmodelled=(
        UnmodelledRecord("Add", "", 17, unbound), UnmodelledRecord("MatMul", "", 17, unbound),
        UnmodelledRecord("FancyOp", "com.example", 2, "no cost function")))
    verdict = _one(_policy("- {id: c, kind: max_unmodelled, max_work_share: 5%, "
                           "max_node_share: 20%}"), head)
    work, nodes = verdict.findings
    for finding in (work, nodes):
        assert finding.message.count("bind it with") == 1
        assert f"(Add x17, MatMul x17: {unbound}; FancyOp x2: no cost function)" in \
            finding.message
    assert "100.0% of the nodes are in ops roofgate cannot cost" in nodes.message
    assert "nodes is" not in verdict.summary


@pytest.mark.parametrize("check", ["params", "activations", "both"])
def test_fits_in_buffer_messages_end_with_the_verdict_remedy(check: str) -> None:
    spill = _layer("fc", params_fit=False, activations_fit=False)
    verdict = _one(_policy(f"- {{id: fit, kind: fits_in_buffer, check: {check}}}"), _run(spill))
    assert verdict.findings
    for finding in verdict.findings:  # the terminal strips exactly this tail to show it once
        assert finding.message.endswith(f": {verdict.remedy}.")


def test_messages_name_metrics_readably_with_the_key_once() -> None:
    base = _run(_layer("conv1", energy_j=1e-4))
    head = _run(_layer("conv1", energy_j=2e-4))
    verdict = _one(_policy("- {id: r, kind: max_regression, metric: energy_j, "
                           "max_increase_pct: 5}"), head, base)
    (finding,) = verdict.findings
    assert finding.message.startswith("Model: energy [energy_j] 100 uJ -> 200 uJ against the "
                                      "baseline, worse by 100 uJ (+100%)")
    assert finding.message.count("energy_j") == 1
    assert "energy [energy_j] no worse than +5%" in verdict.description


# --- scoping ---------------------------------------------------------------------------------

SCOPES = [
    ("models: ['models/trailcam/**']", SPECIES, TARGET, True),
    ("models: ['models/handheld/**']", SPECIES, TARGET, False),
    ("exclude_models: ['**/species.onnx']", SPECIES, TARGET, False),
    ("targets: ['ws-*']", SPECIES, TARGET, True),
    ("targets: ['os-*', 'mv-*']", SPECIES, TARGET, False),
    ("models: ['**'], targets: ['ws-64x64-4mib']", "./models/trailcam/species.onnx", TARGET, True),
]


@pytest.mark.parametrize(("scope", "model", "target", "applies"), SCOPES)
def test_rules_scoped_away_yield_no_verdict(scope: str, model: str, target: str,
                                            applies: bool) -> None:
    policy = _policy(f"- {{id: t, kind: max_latency, max: 1 s, {scope}}}")
    verdicts = evaluate(policy, _run(model=model, target=target), None, None, today=TODAY)
    assert len(verdicts) == (1 if applies else 0)


def test_layer_scope_by_name_and_op_type() -> None:
    head = _run(_layer("backbone/conv1", utilization=0.1), _layer("head/fc", "Gemm",
                                                                   utilization=0.1),
                _layer("backbone/dw_conv", utilization=0.1))
    rules = ("- {id: u, kind: min_utilization, level: layer, min: 0.3, layers: ['backbone/*'], "
             "exclude_layers: ['*dw*'], op_types: [Conv]}")
    assert [f.layer for f in _one(_policy(rules), head).findings] == ["backbone/conv1"]


def test_policy_targets_and_deleted_models() -> None:
    policy = _policy("- {id: t, kind: max_latency, max: 1 s}", top="targets: ['os-*']\n")
    assert evaluate(policy, _run(), None, None, today=TODAY) == ()
    assert len(evaluate(policy, _run(target="os-16x16-512kib"), None, None, today=TODAY)) == 1
    assert evaluate(policy, None, _run(), None, today=TODAY) == ()  # deleted model


def test_verdicts_keep_rule_order_and_carry_rule_fields() -> None:
    policy = _policy("""
        - {id: b, kind: max_latency, max: 1 s, severity: warning, description: fast enough}
        - {id: a, kind: max_energy, max: 1 J, remedy: ask the platform team}
    """)
    verdicts = evaluate(policy, _run(), None, None, today=TODAY)
    assert [(v.rule_id, v.kind, v.severity) for v in verdicts] == [
        ("b", "max_latency", "warning"), ("a", "max_energy", "error")]
    assert verdicts[0].description == "fast enough"
    assert verdicts[1].remedy == "ask the platform team"
    assert all(v.model == SPECIES and v.target == TARGET for v in verdicts)


def test_warning_failures_do_not_block_the_merge() -> None:
    rules = "- {id: t, kind: max_latency, max: 1 ms, severity: SEVERITY}"
    warn = _one(_policy(rules.replace("SEVERITY", "warning")), _run())
    error = _one(_policy(rules.replace("SEVERITY", "error")), _run())
    assert (warn.status, warn.blocks_merge) == (FAIL, False)
    assert (error.status, error.blocks_merge) == (FAIL, True)


# --- waivers ----------------------------------------------------------------------------

_UTIL = "- {id: util, kind: min_utilization, level: layer, min: 30%}"
_TWO_IDLE = _run(_layer("conv5", utilization=0.1), _layer("dw1", utilization=0.2), _layer("ok"))

WAIVER_CASES = [
    # waivers, today, verdict status, finding statuses
    ("- {rule: util, models: ['**'], reason: r, expires: 2027-01-31}", TODAY, WAIVED,
     [WAIVED, WAIVED]),
    ("- {rule: util, models: ['**'], layers: [conv5], reason: r, expires: 2027-01-31}", TODAY,
     FAIL, [WAIVED, FAIL]),
    ("- {rule: util, models: ['**'], reason: r, expires: 2026-12-02}", date(2026, 12, 2), WAIVED,
     [WAIVED, WAIVED]),  # valid through its expiry day
    ("- {rule: util, models: ['**'], reason: r, expires: 2026-12-02}", date(2026, 12, 3), FAIL,
     [FAIL, FAIL]),
    ("- {rule: util, models: ['models/handheld/**'], reason: r, expires: 2027-01-31}", TODAY, FAIL,
     [FAIL, FAIL]),
    ("- {rule: util, models: ['**'], targets: ['os-*'], reason: r, expires: 2027-01-31}", TODAY,
     FAIL, [FAIL, FAIL]),
    ("""
        - {rule: util, models: ['**'], reason: old, expires: 2026-01-01}
        - {rule: util, models: ['**'], reason: renewed, expires: 2027-06-30}
     """, TODAY, WAIVED,
     [WAIVED, WAIVED]),  # an active waiver wins over an expired one
]


@pytest.mark.parametrize(("waivers", "today", "status", "statuses"), WAIVER_CASES)
def test_waivers(waivers: str, today: date, status: str, statuses: list[str]) -> None:
    verdict = _one(_policy(_UTIL, waivers), _TWO_IDLE, today=today)
    assert verdict.status == status
    assert [f.status for f in verdict.findings] == statuses


def test_expired_waiver_fails_with_a_message_saying_so() -> None:
    policy = _policy(_UTIL, "- {rule: util, models: ['**'], layers: [conv5], "
                            "reason: 'depthwise until v3 (vision team)', expires: 2026-11-30}")
    verdict = _one(policy, _TWO_IDLE)
    conv5 = verdict.findings[0]
    assert conv5.status == FAIL and conv5.waiver_expires == "2026-11-30"
    assert conv5.message.startswith("The waiver for util on layer 'conv5' expired on 2026-11-30: "
                                    "depthwise until v3 (vision team). Layer 'conv5' (Conv): "
                                    "utilization 10.0% is below")
    assert "waiver expired on 2026-11-30" in verdict.summary


def test_waived_finding_keeps_reason_and_expiry_and_summary_says_waived() -> None:
    policy = _policy(_UTIL, "- {rule: util, models: ['**'], reason: 'tracked in #12', "
                            "expires: 2027-01-31}")
    verdict = _one(policy, _TWO_IDLE)
    assert {(f.waiver_reason, f.waiver_expires) for f in verdict.findings} == {
        ("tracked in #12", "2027-01-31")}
    assert verdict.summary.endswith("(all waived)") and not verdict.blocks_merge


def test_partly_waived_summary_counts_only_failing_layers() -> None:
    policy = _policy(_UTIL, "- {rule: util, models: ['**'], layers: [conv5], reason: r, "
                            "expires: 2027-01-31}")
    verdict = _one(policy, _TWO_IDLE)
    assert verdict.summary == "1 layer below 30.0% utilization; worst: dw1 20.0%; 1 more waived"


def test_model_level_waiver() -> None:
    policy = _policy("- {id: t, kind: max_latency, max: 1 ms}",
                     f"- {{rule: t, models: ['{SPECIES}'], reason: r, expires: 2027-01-31}}")
    assert _one(policy, _run()).status == WAIVED
    assert _one(policy, _run(model="models/handheld/wakeword.onnx")).status == FAIL


def test_unused_waivers_are_noted() -> None:
    policy = _policy(_UTIL, """
        - {rule: util, models: ['**'], layers: [conv5], reason: used, expires: 2027-01-31}
        - {rule: util, models: ['**'], layers: [gone], reason: stale, expires: 2027-01-31}
    """)
    verdicts = evaluate(policy, _TWO_IDLE, None, None, today=TODAY)
    (note,) = unused_waivers([policy], verdicts)
    assert note == ("test.yaml:6: the waiver for util (expires 2027-01-31) matched no finding "
                    "in this run; remove it if the problem is fixed")


# --- several policies and unanalysable models ----------------------------------------------

def test_evaluate_all_and_allow_unanalysable() -> None:
    strict = _policy("- {id: t, kind: max_latency, max: 1 ms}")
    lax = _policy("- {id: e, kind: max_energy, max: 1 J}", top="allow_unanalysable: true\n")
    verdicts = evaluate_all([strict, lax], _run(), None, None, today=TODAY)
    assert [v.rule_id for v in verdicts] == ["t", "e"]
    assert allow_unanalysable([lax]) is True
    assert allow_unanalysable([lax, strict]) is False  # fail closed: every policy must allow it
    assert allow_unanalysable([]) is False


def test_regression_against_a_baseline_without_the_metric_says_it_was_not_checked() -> None:
    base = _run()
    old = replace(base, metrics={k: v for k, v in base.metrics.items() if k != "energy_j"})
    verdict = _one(_policy("- {id: r, kind: max_regression, metric: energy_j, "
                           "max_increase_pct: 1}"), _run(), old)
    assert verdict.status == PASS and "regression not checked" in verdict.summary


def test_new_model_passes_regression_rules_saying_there_is_no_baseline() -> None:
    verdict = _one(_policy("- {id: r, kind: max_regression, metric: latency_s, "
                           "max_increase_pct: 1}"), _run(), None)
    assert (verdict.status, verdict.summary) == (
        PASS, "no baseline for this model and target; regression not checked")


# --- end to end on the fictional scenario, through the real pipeline ------------------------

def test_default_policy_on_the_demo_pull_request(tmp_path: Path) -> None:
    """The demo PR widens the species model's last stage: on the 4 MiB weight-stationary
    target exactly one layer's parameters overflow the buffer. Its size is worked out from the
    ONNX Conv weight shape (M x C/group x kH x kW, ONNX operator spec): 384 x 384 x 3 x 3
    fp32 values = 5,308,416 bytes. The wake-word pruning is an improvement: no regression."""
    targets = load_targets(["ws-64x64-4mib"])
    runs: dict[str, list[RunRecord]] = {}
    for variant in ("base", "pr"):
        write_scenario(tmp_path / variant, variant)
        runs[variant] = [r for p in (SPECIES_PATH, WAKEWORD_PATH)
                         for r in analyse(str(tmp_path / variant / p), targets, shown_path=p)]
    policies = load_policies([Path(__file__).resolve().parent.parent / "gate/policies/default.yaml"])
    result = judge(runs["pr"], runs["base"], policies, command="evaluate", today=TODAY)
    verdicts = {(e.model, v.rule_id): v for e in result.entries for v in e.verdicts}

    fit = verdicts[(SPECIES_PATH, "params-fit-buffer")]
    (finding,) = fit.findings
    assert (fit.status, finding.layer, finding.value) == (FAIL, "stage4.block1.conv2", 5_308_416)
    assert finding.limit == 4 * MiB
    assert "parameters 5.06 MiB exceed the 4.00 MiB parameter buffer" in finding.message
    assert result.exit_code == 1

    base_verdicts = judge(runs["base"], [], policies, command="evaluate", today=TODAY)
    assert all(v.status == PASS for e in base_verdicts.entries for v in e.verdicts
               if v.rule_id == "params-fit-buffer")
    assert all(v.status == PASS for (model, rule), v in verdicts.items()
               if model == WAKEWORD_PATH and "regression" in rule)


def test_layer_limit_summary_says_which_side_of_the_limit() -> None:
    head = _run(_layer("a", act_dram_bytes=2 * MiB), _layer("b"))
    verdict = _one(_policy("- {id: m, kind: metric_limit, level: layer, metric: act_dram_bytes, "
                           "max: 1 MiB}"), head)
    assert verdict.summary == ("1 layer with activation DRAM traffic above 1.00 MiB; worst: "
                               "a 2.00 MiB")
