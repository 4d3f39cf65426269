"""Flat, serialisable records of a model on a target: the interchange of roofgate.

A ``RunRecord`` is everything later stages need about one model x target: the
model totals, the target's key figures, and one ``LayerRecord`` per layer, each
with a mapping of named metrics. Rules, diffs, baselines, shard merging and
every reporter work from records only, so a result read back from JSON reports
exactly like the one computed in-process.

Metric names carry their unit (``_bytes``, ``_s``, ``_j``, ``_per_s``); the
metric catalogue (``gate.metrics``) lists them with their labels, units and
directions. Values are ints for counts and bytes, floats otherwise.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from gate.metrics import LAYER_METRICS, MODEL_METRICS, TARGET_FIGURES

Metric = int | float | None  # None: unknown (never 0); JSON null, printed as '?'

# Model totals that depend on costing the work: unknown (None) in a record none of whose
# work could be costed (``nothing_costed``), never 0.
COSTED_MODEL_METRICS: tuple[str, ...] = (
    "macs", "flops", "latency_s", "inferences_per_s", "achieved_flops_per_s",
    "peak_flops_share", "utilization", "energy_j", "energy_mac_j", "energy_buffer_j",
    "energy_noc_j", "energy_dram_param_j", "energy_dram_act_j", "energy_static_j",
    "flops_per_j", "peak_flops_per_j_share", "param_dram_bytes", "act_dram_bytes",
)

__all__ = ["LAYER_METRICS", "MODEL_METRICS", "TARGET_FIGURES"]  # re-exported from gate.metrics

@dataclass(frozen=True, slots=True)
class LayerRecord:
    name: str
    op_type: str
    signature: str  # op type + input/output shapes and dtypes; used to align renamed layers
    engine: str
    bound: str
    modelled: bool
    unmodelled_reason: str
    params_fit: bool
    activations_fit: bool | None  # None: an activation's size is unknown (never "fits")
    metrics: Mapping[str, Metric]
    fused_into: str = ""  # head layer of the fused group this layer runs in ("" when alone)
    fused_ops: tuple[str, ...] = ()  # on a group's head: the op types it absorbed, in order
    precision: str = ""  # the precision the layer was costed at ("" when it ran nowhere)

    def metric(self, name: str) -> Metric:
        return self.metrics[name]

    @property
    def fused_label(self) -> str:
        """How reports name the layer's fused group: 'conv1+BatchNormalization+Relu', or ''."""
        if self.fused_ops:
            return "+".join((self.name, *self.fused_ops))
        return f"in {self.fused_into}" if self.fused_into else ""


@dataclass(frozen=True, slots=True)
class UnmodelledRecord:
    op_type: str
    domain: str
    count: int
    reason: str


@dataclass(frozen=True, slots=True)
class RunRecord:
    """One model on one target."""

    model: str  # the model's path as given (repo-relative in checks)
    model_name: str
    target: str
    precision: str
    metrics: Mapping[str, Metric]
    target_figures: Mapping[str, Metric]
    layers: tuple[LayerRecord, ...]
    unmodelled: tuple[UnmodelledRecord, ...] = ()
    notes: tuple[str, ...] = ()
    # name -> first layer of that name, built on the first lookup (a scan per lookup made
    # every per-layer caller quadratic); not part of the record's value
    _by_name: dict[str, LayerRecord] | None = field(default=None, init=False, repr=False,
                                                    compare=False)

    @property
    def key(self) -> tuple[str, str]:
        return (self.model, self.target)

    def metric(self, name: str) -> Metric:
        return self.metrics[name]

    def layer(self, name: str) -> LayerRecord | None:
        """The first layer named ``name`` (None if there is none), through the name index."""
        return self.layer_index().get(name)

    def layer_index(self) -> Mapping[str, LayerRecord]:
        """Layer name -> the first layer of that name; built once per record."""
        if self._by_name is None:
            index: dict[str, LayerRecord] = {}
            for layer in self.layers:
                index.setdefault(layer.name, layer)
            object.__setattr__(self, "_by_name", index)  # a cache on a frozen record
        return self._by_name  # type: ignore[return-value]


def nothing_costed(run: RunRecord) -> bool:
    """Whether none of the model's work could be costed: every layer unmodelled, or the
    modelled layers do no arithmetic at all (no MACs, no FLOPs: shape plumbing) while
    others could not be counted. Latency and energy of such a record are unknown."""
    m = run.metrics
    return no_work_costed(int(m.get("layers") or 0), int(m.get("unmodelled_nodes") or 0),
                          bool(m.get("macs")) or bool(m.get("flops")))


def no_work_costed(layers: int, unmodelled: int, any_arithmetic: bool) -> bool:
    """The criterion of ``nothing_costed`` on plain counts (the profile table uses it too)."""
    if layers == 0 or unmodelled == 0:
        return False
    return unmodelled >= layers or not any_arithmetic


def with_unknown_totals(run: RunRecord) -> RunRecord:
    """``run`` with its costed model totals unknown (None) when none of its work was
    costed: its latency and energy are not 0, they are not known."""
    if not nothing_costed(run):
        return run
    metrics = {k: (None if k in COSTED_MODEL_METRICS else v) for k, v in run.metrics.items()}
    return RunRecord(run.model, run.model_name, run.target, run.precision, metrics,
                     run.target_figures, run.layers, run.unmodelled, run.notes)


def coverage_note(run: RunRecord) -> str:
    """One line saying how much of the model is modelled and how to fix it, or '' when all
    of it is: every command shows it (figures of a partly modelled model are lower bounds)."""
    share = run.metrics.get("coverage_work_share")
    unmodelled = int(run.metrics.get("unmodelled_nodes") or 0)
    if not unmodelled:
        return ""
    layers = int(run.metrics.get("layers") or 0)
    what = ("none of the work could be costed, so latency and energy are unknown"
            if nothing_costed(run) else
            f"only {float(share or 0) * 100:.1f}% of the work is modelled, so totals are lower "
            "bounds")
    remedy = next((f"{n} (or --shape INPUT=SHAPE)" for n in run.notes if "unbound" in n), "")
    fix = (f"; {remedy}" if remedy else
           "; see `roofgate profile` for why each layer is unmodelled")
    return f"{run.model} on {run.target}: {unmodelled} of {layers} layers unmodelled: {what}{fix}"


def canonical_run(run: RunRecord) -> RunRecord:
    """``run`` exactly as a JSON round trip (``run_from_dict(run_to_dict(run))``) gives it
    back, metrics in sorted order, without building the dicts: what workers send back, so
    in-process, worker and shard-file records report byte for byte alike."""
    layers = tuple(_canonical_layer(layer) for layer in run.layers)
    return RunRecord(run.model, run.model_name, run.target, run.precision,
                     dict(sorted(run.metrics.items())), dict(sorted(run.target_figures.items())),
                     layers, tuple(run.unmodelled), tuple(run.notes))


def _canonical_layer(layer: LayerRecord) -> LayerRecord:
    return LayerRecord(layer.name, layer.op_type, layer.signature, layer.engine, layer.bound,
                       layer.modelled, layer.unmodelled_reason, layer.params_fit,
                       layer.activations_fit, sorted_metrics(layer.metrics),
                       layer.fused_into, tuple(layer.fused_ops), layer.precision)


# --- JSON-ready dicts (the snapshot/result writers add versioning around these) ---

def sorted_metrics(metrics: Mapping[str, Metric]) -> dict[str, Metric]:
    """``dict(sorted(metrics.items()))``; a metrics view that knows its sorted order gives
    it directly (``gate.summarize.LayerMetrics``: no sort per layer per target)."""
    as_sorted = getattr(metrics, "sorted_dict", None)
    if as_sorted is not None:
        return as_sorted()  # type: ignore[no-any-return]
    return dict(sorted(metrics.items()))


def layer_to_dict(layer: LayerRecord) -> dict[str, Any]:
    return {
        "name": layer.name,
        "op_type": layer.op_type,
        "signature": layer.signature,
        "engine": layer.engine,
        "bound": layer.bound,
        "modelled": layer.modelled,
        "unmodelled_reason": layer.unmodelled_reason,
        "params_fit": layer.params_fit,
        "activations_fit": layer.activations_fit,
        "precision": layer.precision,
        "metrics": sorted_metrics(layer.metrics),
        "fused_into": layer.fused_into,
        "fused_ops": list(layer.fused_ops),
    }


def layer_from_dict(data: Mapping[str, Any]) -> LayerRecord:
    return LayerRecord(
        name=str(data["name"]),
        op_type=str(data["op_type"]),
        signature=str(data["signature"]),
        engine=str(data["engine"]),
        bound=str(data["bound"]),
        modelled=bool(data["modelled"]),
        unmodelled_reason=str(data["unmodelled_reason"]),
        params_fit=bool(data["params_fit"]),
        activations_fit=(None if data["activations_fit"] is None
                         else bool(data["activations_fit"])),
        metrics=_metrics(data["metrics"]),
        fused_into=str(data.get("fused_into", "")),
        fused_ops=tuple(str(op) for op in data.get("fused_ops", ())),
        precision=str(data.get("precision", "")),  # absent in documents before it existed
    )


def run_to_dict(run: RunRecord) -> dict[str, Any]:
    return {
        "model": run.model,
        "model_name": run.model_name,
        "target": run.target,
        "precision": run.precision,
        "metrics": dict(sorted(run.metrics.items())),
        "target_figures": dict(sorted(run.target_figures.items())),
        "unmodelled": [
            {"op_type": u.op_type, "domain": u.domain, "count": u.count, "reason": u.reason}
            for u in run.unmodelled
        ],
        "notes": list(run.notes),
        "layers": [layer_to_dict(layer) for layer in run.layers],
    }


def run_from_dict(data: Mapping[str, Any]) -> RunRecord:
    return RunRecord(
        model=str(data["model"]),
        model_name=str(data["model_name"]),
        target=str(data["target"]),
        precision=str(data["precision"]),
        metrics=_metrics(data["metrics"]),
        target_figures=_metrics(data["target_figures"]),
        layers=tuple(layer_from_dict(item) for item in data["layers"]),
        unmodelled=tuple(
            UnmodelledRecord(str(u["op_type"]), str(u["domain"]), int(u["count"]), str(u["reason"]))
            for u in data["unmodelled"]
        ),
        notes=tuple(str(n) for n in data["notes"]),
    )


def _metrics(data: Mapping[str, Any]) -> dict[str, Metric]:
    out: dict[str, Metric] = {}
    for key, value in data.items():
        kind = type(value)  # exact types first (the common case; a bool is not a number)
        if kind is not float and kind is not int and value is not None and (
                isinstance(value, bool) or not isinstance(value, (int, float))):
            raise ValueError(f"metric {key!r} is not a number")
        out[str(key)] = value
    return out

