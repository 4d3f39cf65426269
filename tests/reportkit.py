"""Hand-made GateResults for the HTML and SARIF reporter tests.

The records are self-consistent the way the cost model makes them (latency is
max(compute, memory) + overhead, achieved FLOP/s = FLOPs / latency, energy
parts sum to the total), but built directly, so the reporter tests do not
depend on the profiling stages.
"""

from __future__ import annotations

from dataclasses import replace

from gate.records import LAYER_METRICS, MODEL_METRICS, TARGET_FIGURES, LayerRecord, RunRecord
from gate.result import (
    FAIL,
    PASS,
    WAIVED,
    Entry,
    Finding,
    GateResult,
    LayerChange,
    RunDiff,
    Verdict,
)

HOSTILE = "<img src=x onerror=alert(1)>"
PEAK_FLOPS_PER_S = 2.0e12  # a made-up target: 2 TFLOP/s peak, 25 GB/s DRAM (ridge at 80 FLOP/B)
DRAM_BYTES_PER_S = 25.0e9
ENERGY_PARTS = ("mac_j", "buffer_j", "noc_j", "dram_param_j", "dram_act_j", "static_j")


def make_layer(name: str, macs: int, param_bytes: int, act_bytes: int, *,
               op_type: str = "Conv", utilization: float = 0.6,
               peak: float = PEAK_FLOPS_PER_S, bandwidth: float = DRAM_BYTES_PER_S) -> LayerRecord:
    """One layer; zero MACs gives a layer with no place on a roofline (a view op)."""
    flops = 2 * macs
    traffic = param_bytes + act_bytes
    compute_s = flops / (peak * utilization) if flops else 0.0
    memory_s = traffic / bandwidth
    latency_s = max(compute_s, memory_s) + 1e-7
    energy = {"mac_j": macs * 0.2e-12, "buffer_j": traffic * 1.1e-12, "noc_j": macs * 0.05e-12,
              "dram_param_j": param_bytes * 20e-12, "dram_act_j": act_bytes * 20e-12,
              "static_j": latency_s * 0.05}
    metrics = {
        "macs": macs, "flops": flops, "param_count": param_bytes, "param_bytes": param_bytes,
        "input_bytes": act_bytes // 2, "output_bytes": act_bytes - act_bytes // 2,
        "arithmetic_intensity": flops / traffic if traffic else 0.0,
        "param_reuse": float(macs // param_bytes) if param_bytes else 0.0,
        "cycles": int(compute_s * 1e9), "utilization": utilization if flops else 0.0,
        "compute_s": compute_s, "memory_s": memory_s, "overhead_s": 1e-7, "latency_s": latency_s,
        "param_dram_bytes": param_bytes, "act_dram_bytes": act_bytes,
        "achieved_flops_per_s": flops / latency_s, "energy_j": sum(energy.values()),
        **{f"energy_{k}": v for k, v in energy.items()},
    }
    assert set(metrics) == set(LAYER_METRICS)
    return LayerRecord(
        name=name, op_type=op_type, signature=f"{op_type}(f32[{macs}])->(f32[1])",
        engine="array" if flops else "none",
        bound="compute" if compute_s >= memory_s else "memory", modelled=True,
        unmodelled_reason="", params_fit=param_bytes < 256 * 1024, activations_fit=True,
        metrics=metrics)


def make_run(model: str, target: str, layers: list[LayerRecord]) -> RunRecord:
    """A run whose totals are the sums of its layers."""
    def total(metric: str) -> float:
        return sum(layer.metrics[metric] for layer in layers)

    latency_s = total("latency_s")
    energy_j = total("energy_j")
    metrics = {name: 0 for name in MODEL_METRICS}
    metrics.update({
        "layers": len(layers), "macs": int(total("macs")), "flops": int(total("flops")),
        "param_count": int(total("param_count")), "param_bytes": int(total("param_bytes")),
        "max_layer_param_bytes": max((l.metrics["param_bytes"] for l in layers), default=0),
        "latency_s": latency_s, "inferences_per_s": 1 / latency_s if latency_s else 0.0,
        "achieved_flops_per_s": total("flops") / latency_s if latency_s else 0.0,
        "utilization": 0.5, "energy_j": energy_j,
        **{f"energy_{k}": total(f"energy_{k}") for k in ENERGY_PARTS},
        "param_dram_bytes": int(total("param_dram_bytes")),
        "act_dram_bytes": int(total("act_dram_bytes")),
        "coverage_node_share": 1.0, "coverage_work_share": 1.0, "unmodelled_nodes": 0,
    })
    metrics["peak_flops_share"] = metrics["achieved_flops_per_s"] / PEAK_FLOPS_PER_S
    figures = {name: 0 for name in TARGET_FIGURES}
    figures.update({"peak_flops_per_s": PEAK_FLOPS_PER_S, "dram_bytes_per_s": DRAM_BYTES_PER_S,
                    "ridge_flop_per_byte": PEAK_FLOPS_PER_S / DRAM_BYTES_PER_S,
                    "param_buffer_bytes": 256 * 1024, "activation_buffer_bytes": 512 * 1024,
                    "pe_count": 4096, "clock_hz": 250_000_000, "peak_flops_per_j": 1e12})
    name = model.rsplit("/", 1)[-1].removesuffix(".onnx")
    return RunRecord(model=model, model_name=name, target=target, precision="int8",
                     metrics=metrics, target_figures=figures, layers=tuple(layers))


def cnn_layers(width: int = 1, hostile: bool = False) -> list[LayerRecord]:
    """A small CNN-like model; ``width`` scales the last stage, ``hostile`` names a node badly."""
    layers = [
        make_layer("stem.conv", 1_800_000, 900, 300_000),
        make_layer("stage1.conv", 9_000_000, 36_000, 200_000),
        make_layer("stage1.dw", 400_000, 1_200, 100_000, utilization=0.08),
        make_layer("stage2.conv", 12_000_000, 148_000 * width, 100_000),
        make_layer("flatten", 0, 0, 4_096, op_type="Flatten"),
        make_layer("head.fc", 640_000, 640_000, 4_000, op_type="Gemm"),
    ]
    if hostile:
        layers[1] = replace(layers[1], name=HOSTILE)
    return layers


def make_verdict(rule_id: str, model: str, target: str, status: str, *,
                 severity: str = "error", layer: str | None = None) -> Verdict:
    """A verdict with one finding (on ``layer``) when it did not pass."""
    findings: tuple[Finding, ...] = ()
    if status != PASS:
        findings = (Finding(
            layer=layer, metric="param_bytes", value=300_000, limit=262_144,
            message=f"{'layer ' + layer if layer else 'the model'} keeps 293 KiB of parameters, "
                    "over the 256 KiB buffer; split the layer or quantize its weights",
            status=FAIL if status == FAIL else WAIVED,
            waiver_reason="accepted for the field trial" if status == WAIVED else "",
            waiver_expires="2027-01-31" if status == WAIVED else ""),)
    return Verdict(
        rule_id=rule_id, kind="fits_in_buffer", severity=severity,
        description="Every layer's parameters fit the parameter buffer.",
        model=model, target=target, status=status,
        summary="1 layer over the parameter buffer" if status != PASS else "all layers fit",
        remedy="Split the layer, quantize its weights, or pick a target with a larger buffer.",
        findings=findings)


def diff_of(base: RunRecord, head: RunRecord) -> RunDiff:
    """A name-matched diff of two runs (what the baseline stage would produce)."""
    changes = []
    base_names = {l.name for l in base.layers}
    head_names = {l.name for l in head.layers}
    for layer in head.layers:
        old = base.layer(layer.name)
        if old is None:
            changes.append(LayerChange("added", None, layer.name, layer.op_type, "", {}))
            continue
        deltas = {m: (old.metrics[m], layer.metrics[m]) for m in LAYER_METRICS
                  if old.metrics[m] != layer.metrics[m]}
        changes.append(LayerChange("changed" if deltas else "unchanged", old.name, layer.name,
                                   layer.op_type, "name", deltas))
    for layer in base.layers:
        if layer.name not in head_names:
            changes.append(LayerChange("removed", layer.name, None, layer.op_type, "", {}))
    assert base_names  # a diff needs a base
    totals = {m: (base.metrics[m], head.metrics[m]) for m in MODEL_METRICS}
    return RunDiff(model=head.model, target=head.target, totals=totals, layers=tuple(changes))


def demo_result(*, hostile: bool = False, command: str = "check") -> GateResult:
    """The fictional demo PR: the species model widened (fails a rule), the wake word pruned."""
    species, wake = "models/trailcam/species.onnx", "models/handheld/wakeword.onnx"
    target = "ws-64x64-4mib"
    base = make_run(species, target, cnn_layers(1))
    head = make_run(species, target, cnn_layers(2, hostile=hostile))
    wake_base = make_run(wake, target, [make_layer("gru", 2_000_000, 2_000_000, 8_000,
                                                   op_type="GRU", utilization=0.02)])
    wake_head = make_run(wake, target, [make_layer("gru", 1_000_000, 1_000_000, 8_000,
                                                   op_type="GRU", utilization=0.02)])
    entries = (
        Entry(wake, target, wake_head, wake_base, diff_of(wake_base, wake_head), (
            make_verdict("params-fit", wake, target, WAIVED, layer="gru"),
            make_verdict("min-utilization", wake, target, FAIL, severity="warning"),
        )),
        Entry(species, target, head, base, diff_of(base, head), (
            make_verdict("params-fit", species, target, FAIL, layer="stage2.conv"),
            make_verdict("min-utilization", species, target, PASS),
        )),
    )
    return GateResult(command=command, policies=("policy.yaml",), entries=entries)
