"""Flatten a profile and its cost on a target into a ``RunRecord`` (the one place that does)."""

from __future__ import annotations

from functools import lru_cache

from gate.costmodel import EnergyBreakdown, LayerCost, ModelCost
from gate.profile import LayerProfile, ModelProfile
from gate.records import LayerRecord, Metric, RunRecord, UnmodelledRecord
from gate.targets.spec import TargetProfile

_ENERGY_PARTS = tuple(EnergyBreakdown().as_dict())
_ENERGY_KEYS = tuple(f"energy_{part}" for part in _ENERGY_PARTS)
_UNKNOWN_ENERGY_PARTS: dict[str, Metric] = dict.fromkeys(_ENERGY_KEYS)


def build_run_record(model_path: str, profile: ModelProfile, cost: ModelCost,
                     target: TargetProfile) -> RunRecord:
    """The record of ``profile`` costed on ``target``; ``model_path`` is how reports name it."""
    layers = tuple(
        _layer_record(layer, layer_cost) for layer, layer_cost in zip(profile.layers, cost.layers)
    )
    return RunRecord(
        model=model_path,
        model_name=profile.model.name,
        target=target.name,
        precision=cost.precision,
        metrics=_model_metrics(profile, cost),
        target_figures=_target_figures(cost, target),
        layers=layers,
        unmodelled=tuple(
            UnmodelledRecord(u.op_type, u.domain, u.count, u.reason)
            for u in profile.coverage.unmodelled
        ),
        notes=profile.notes + cost.notes,
    )


def layer_signature(layer: LayerProfile) -> str:
    """Op type plus shapes and dtypes: stable across exporters that rename nodes."""
    ins = ",".join(_shape_text(s, d) for s, d in zip(layer.input_shapes, layer.input_dtypes))
    outs = ",".join(_shape_text(s, d) for s, d in zip(layer.output_shapes, layer.output_dtypes))
    return f"{layer.domain + '.' if layer.domain else ''}{layer.op_type}({ins})->({outs})"


@lru_cache(maxsize=1 << 16)  # graphs repeat a few (shape, dtype) pairs across many layers
def _shape_text(shape: tuple[int | str, ...] | None, dtype: str) -> str:
    dims = "?" if shape is None else "x".join(map(str, shape))
    return f"{dtype.lower()}[{dims}]"


def _achieved(flops: int | None, latency_s: float | None) -> float | None:
    """FLOP/s a layer achieves; None when either side is unknown (0 when it takes no time)."""
    if flops is None or latency_s is None:
        return None
    return flops / latency_s if latency_s > 0 else 0.0


def _layer_record(layer: LayerProfile, cost: LayerCost) -> LayerRecord:
    """One layer's record; its energy parts spelled out (called per layer per target)."""
    energy = cost.energy
    parts: dict[str, Metric] = (_UNKNOWN_ENERGY_PARTS if energy is None
                                else dict(zip(_ENERGY_KEYS, energy.as_dict().values())))
    metrics: dict[str, Metric] = {
        "macs": layer.macs,
        "flops": layer.flops,
        "param_count": layer.param_count,
        "param_bytes": layer.param_bytes,
        "input_bytes": layer.input_bytes,
        "output_bytes": layer.output_bytes,
        "arithmetic_intensity": layer.arithmetic_intensity,
        "param_reuse": layer.param_reuse,
        "cycles": cost.cycles,
        "utilization": cost.utilization,
        "compute_s": cost.compute_s,
        "memory_s": cost.memory_s,
        "overhead_s": cost.overhead_s,
        "latency_s": cost.latency_s,
        "param_dram_bytes": cost.param_dram_bytes,
        "act_dram_bytes": cost.act_dram_bytes,
        "achieved_flops_per_s": _achieved(layer.flops, cost.latency_s),
        "energy_j": None if energy is None else energy.total_j,
        **parts,
    }
    return LayerRecord(
        name=layer.name,
        op_type=layer.op_type,
        signature=layer_signature(layer),
        engine=cost.engine,
        bound=cost.bound,
        modelled=layer.modelled,
        unmodelled_reason=layer.unmodelled_reason,
        params_fit=cost.params_fit,
        activations_fit=cost.activations_fit,
        metrics=metrics,
        fused_into=cost.fused_into,
        fused_ops=cost.fused_ops,
        precision=cost.precision,
    )


def _model_metrics(profile: ModelProfile, cost: ModelCost) -> dict[str, Metric]:
    energy_j = cost.energy.total_j
    achieved = profile.total_flops / cost.latency_s if cost.latency_s > 0 else 0.0
    flops_per_j = profile.total_flops / energy_j if energy_j > 0 else 0.0
    coverage = profile.coverage
    return {
        "layers": len(profile.layers),
        "macs": profile.total_macs,
        "flops": profile.total_flops,
        "param_count": profile.total_param_count,
        "param_bytes": profile.total_param_bytes,
        "max_layer_param_bytes": max((layer.param_bytes for layer in profile.layers), default=0),
        "latency_s": cost.latency_s,
        "inferences_per_s": cost.inferences_per_s,
        "achieved_flops_per_s": achieved,
        "peak_flops_share": achieved / cost.peak_flops_per_s if cost.peak_flops_per_s else 0.0,
        "utilization": cost.utilization,
        "energy_j": energy_j,
        **{f"energy_{part}": value for part, value in cost.energy.as_dict().items()},
        "flops_per_j": flops_per_j,
        "peak_flops_per_j_share": flops_per_j / cost.peak_flops_per_j if cost.peak_flops_per_j else 0.0,
        "param_dram_bytes": cost.param_dram_bytes,
        "act_dram_bytes": cost.act_dram_bytes,
        "coverage_node_share": coverage.node_share,
        "coverage_work_share": coverage.work_share,
        "unmodelled_nodes": coverage.nodes_total - coverage.nodes_modelled,
    }


def _target_figures(cost: ModelCost, target: TargetProfile) -> dict[str, Metric]:
    ridge = cost.peak_flops_per_s / target.dram_bytes_per_s if target.dram_bytes_per_s else 0.0
    param_buffer = target.param_buffer_bytes or target.unified_buffer_bytes
    act_buffer = target.activation_buffer_bytes or target.unified_buffer_bytes
    return {
        "peak_flops_per_s": cost.peak_flops_per_s,
        "peak_flops_per_j": cost.peak_flops_per_j,
        "dram_bytes_per_s": target.dram_bytes_per_s,
        "ridge_flop_per_byte": ridge,
        "param_buffer_bytes": param_buffer,
        "activation_buffer_bytes": act_buffer,
        "unified_buffer_bytes": target.unified_buffer_bytes,  # 0 when buffers are separate
        "pe_count": target.pe_count,
        "clock_hz": target.clock_hz,
    }
