"""Builders of hand-made records, verdicts and results for reporter, diff and snapshot tests.

Values are small and round so expected outputs can be worked out by hand;
every record carries the full metric sets of ``gate.records`` so reporters see
what the real pipeline produces. Demo names follow the fictional scenario
(/work/shared/SCENARIO.md).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from gate.diff import diff_runs
from gate.records import LAYER_METRICS, MODEL_METRICS, TARGET_FIGURES, LayerRecord, RunRecord
from gate.result import FAIL, PASS, WAIVED, Entry, Finding, GateResult, ModelError, Verdict

# A node name an attacker could put in a model: markdown, HTML, a mention, a pipe,
# a newline, a carriage return, an escape sequence, a NUL and a C1 control.
HOSTILE_NAME = ("conv|*x*_[y](http://e.test)`<img src=x onerror=alert(1)>"
                "</details>@all\r\n# head\x00\x1b[31m\x85&amp;")

TARGET = "ws-64x64-4mib"
FIGURES: dict[str, int | float] = {
    "peak_flops_per_s": 1.6384e12, "peak_flops_per_j": 2.0e12, "dram_bytes_per_s": 8.0e9,
    "ridge_flop_per_byte": 204.8, "param_buffer_bytes": 4 * 1024 * 1024,
    "activation_buffer_bytes": 2 * 1024 * 1024, "unified_buffer_bytes": 0, "pe_count": 4096,
    "clock_hz": 2.0e8,
}
assert set(FIGURES) == set(TARGET_FIGURES)


def layer(name: str, op_type: str = "Conv", shape: str = "1x8x16x16", *,
          macs: int = 1000, param_bytes: int = 256, latency_s: float = 1e-5,
          utilization: float = 0.5, **metrics: Any) -> LayerRecord:
    """A layer with every LAYER_METRICS value set; keyword metrics override."""
    values: dict[str, int | float] = {m: 0.0 for m in LAYER_METRICS}
    values.update({
        "macs": macs, "flops": 2 * macs, "param_count": param_bytes, "param_bytes": param_bytes,
        "input_bytes": 512, "output_bytes": 512, "cycles": 2000, "param_dram_bytes": param_bytes,
        "act_dram_bytes": 0, "latency_s": latency_s, "compute_s": latency_s,
        "utilization": utilization, "energy_j": 1e-7, "energy_mac_j": 1e-7,
        "arithmetic_intensity": 2 * macs / (1024 + param_bytes),
        "param_reuse": macs / param_bytes if param_bytes else 0.0,
    })
    values.update(metrics)
    for key in ("macs", "flops", "param_count", "param_bytes", "input_bytes", "output_bytes",
                "cycles", "param_dram_bytes", "act_dram_bytes"):
        values[key] = int(values[key])
    return LayerRecord(
        name=name, op_type=op_type, signature=f"{op_type}(float[{shape}])->(float[{shape}])",
        engine="array", bound="compute", modelled=True, unmodelled_reason="",
        params_fit=values["param_bytes"] <= FIGURES["param_buffer_bytes"],
        activations_fit=True, metrics=values,
    )


def run(model: str = "models/trailcam/species.onnx", target: str = TARGET,
        layers: tuple[LayerRecord, ...] | None = None, **metrics: Any) -> RunRecord:
    """A run whose totals are the sums of its layers; keyword metrics override."""
    if layers is None:
        layers = (layer("stem/conv"), layer("stage1/relu", "Relu", macs=0, param_bytes=0),
                  layer("head/gemm", "Gemm", "1x512", macs=5000, param_bytes=2048))
    total = _sum_metric
    values: dict[str, int | float] = {m: 0.0 for m in MODEL_METRICS}
    values.update({
        "layers": len(layers), "macs": total(layers, "macs"), "flops": total(layers, "flops"),
        "param_count": total(layers, "param_count"), "param_bytes": total(layers, "param_bytes"),
        "max_layer_param_bytes": max((l.metrics["param_bytes"] for l in layers), default=0),
        "latency_s": total(layers, "latency_s"), "energy_j": total(layers, "energy_j"),
        "param_dram_bytes": total(layers, "param_dram_bytes"),
        "act_dram_bytes": total(layers, "act_dram_bytes"), "utilization": 0.5,
        "coverage_node_share": 1.0, "coverage_work_share": 1.0, "unmodelled_nodes": 0,
    })
    latency = float(values["latency_s"])
    values["inferences_per_s"] = 1.0 / latency if latency else 0.0
    values.update(metrics)
    for key in ("layers", "macs", "flops", "param_count", "param_bytes", "max_layer_param_bytes",
                "param_dram_bytes", "act_dram_bytes", "unmodelled_nodes"):
        values[key] = int(values[key])
    return RunRecord(model=model, model_name=model.rsplit("/", 1)[-1].removesuffix(".onnx"),
                     target=target, precision="int8", metrics=values,
                     target_figures=dict(FIGURES), layers=tuple(layers))


def _sum_metric(layers: tuple[LayerRecord, ...], name: str) -> int | float:
    return sum(l.metrics[name] for l in layers)


def finding(layer_name: str | None = "head/gemm", *, metric: str = "param_bytes",
            value: float = 5_000_000, limit: float = 4_194_304,
            status: str = FAIL, waiver_reason: str = "", waiver_expires: str = "",
            message: str = "") -> Finding:
    where = f"layer '{layer_name}'" if layer_name else "the model"
    return Finding(
        layer=layer_name, metric=metric, value=value, limit=limit,
        message=message or (f"{where}: {metric} is {value}, above the limit {limit}; "
                            "split the layer or quantize its weights"),
        status=status, waiver_reason=waiver_reason, waiver_expires=waiver_expires)


def verdict(rule_id: str = "fits-param-buffer", *, status: str = PASS, severity: str = "error",
            model: str = "models/trailcam/species.onnx", target: str = TARGET,
            findings: tuple[Finding, ...] = (), kind: str = "max_layer_metric",
            remedy: str = "split the layer or quantize its weights") -> Verdict:
    summary = {PASS: "all layers within the limit",
               WAIVED: f"{len(findings)} finding(s) waived"}.get(
        status, f"{len(findings)} layer(s) over the limit")
    return Verdict(rule_id=rule_id, kind=kind, severity=severity,
                   description=f"rule {rule_id}", model=model, target=target, status=status,
                   summary=summary, remedy=remedy, findings=findings)


def entry(head: RunRecord | None, base: RunRecord | None = None,
          verdicts: tuple[Verdict, ...] = ()) -> Entry:
    """An entry with the real diff of head against base when both exist."""
    ref = head or base
    assert ref is not None
    diff = diff_runs(base, head) if head and base else None
    return Entry(model=ref.model, target=ref.target, head=head, base=base, diff=diff,
                 verdicts=verdicts)


def result(*entries: Entry, errors: tuple[ModelError, ...] = (), notes: tuple[str, ...] = (),
           command: str = "evaluate") -> GateResult:
    ordered = tuple(sorted(entries, key=lambda e: (e.model, e.target)))
    return GateResult(command=command, policies=("policies/gate.yaml",), entries=ordered,
                      errors=errors, notes=notes)


def demo_result() -> GateResult:
    """The fictional demo PR: the species classifier's last stage is widened past the
    parameter buffer (fails), the wake-word model is pruned (improves), with one
    waived warning, one unanalysable model and a hostile node name."""
    base_species = run()
    head_species = run(layers=(
        layer("stem/conv"), layer("stage1/relu", "Relu", macs=0, param_bytes=0),
        layer("head/gemm", "Gemm", "1x1024", macs=10_000, param_bytes=5_000_000,
              latency_s=4e-4, utilization=0.25),
        layer(HOSTILE_NAME, "Add", macs=0, param_bytes=0)))
    species_fail = verdict(status=FAIL, findings=(finding(value=5_000_000),))
    species_waived = verdict("min-utilization", severity="warning", status=WAIVED,
                             kind="min_layer_metric", findings=(finding(
                                 HOSTILE_NAME, metric="utilization", value=0.0, limit=0.3,
                                 status=WAIVED, waiver_reason="elementwise add, tracked in #12",
                                 message=f"layer '{HOSTILE_NAME}': utilization is 0.0%, below "
                                         "the minimum 30.0%; fuse it into the previous layer",
                                 waiver_expires="2026-12-31"),))
    wake_base = run("models/handheld/wakeword.onnx", layers=(
        layer("gru", "GRU", "1x40x64", macs=400_000, param_bytes=300_000, latency_s=2e-3),))
    wake_head = run("models/handheld/wakeword.onnx", layers=(
        layer("gru_renamed", "GRU", "1x40x48", macs=225_000, param_bytes=170_000,
              latency_s=1.2e-3),))
    return result(
        entry(head_species, base_species, (species_fail, species_waived, verdict("max-latency"))),
        entry(wake_head, wake_base, (verdict("fits-param-buffer", model=wake_head.model),)),
        errors=(ModelError("models/broken<b>|.onnx", "not a valid ONNX file (truncated)"),))


# --- golden files ------------------------------------------------------------------

GOLDEN_DIR = Path(__file__).parent / "golden"
UPDATE_ENV = "ROOFGATE_UPDATE_GOLDEN"


def assert_golden(name: str, text: str) -> None:
    """Compare ``text`` with tests/golden/``name``; rewrite it when ROOFGATE_UPDATE_GOLDEN=1."""
    path = GOLDEN_DIR / name
    if os.environ.get(UPDATE_ENV) == "1":
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(text.encode("utf-8"))
        return
    assert path.exists(), f"missing golden file {path}; create it with {UPDATE_ENV}=1 pytest"
    expected = path.read_bytes().decode("utf-8")
    assert text == expected, (f"{name} differs from its golden file; if the change is intended, "
                              f"regenerate with {UPDATE_ENV}=1 pytest and review the diff")
