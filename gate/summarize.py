"""Flatten a profile and its cost on a target into a ``RunRecord`` (the one place that does)."""

from __future__ import annotations

from collections.abc import Callable, ItemsView, Iterator, Mapping, ValuesView
from functools import lru_cache
from operator import attrgetter, itemgetter

from gate.costmodel import EnergyBreakdown, LayerCost, ModelCost
from gate.model.graph import Shape, cached_call
from gate.profile import LayerProfile, ModelProfile
from gate.records import LayerRecord, Metric, RunRecord, UnmodelledRecord
from gate.targets.spec import TargetProfile

_ENERGY_PARTS = tuple(EnergyBreakdown().as_dict())
_ENERGY_KEYS = tuple(f"energy_{part}" for part in _ENERGY_PARTS)


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
    key = (layer.domain, layer.op_type, layer.input_shapes, layer.input_dtypes,
           layer.output_shapes, layer.output_dtypes)
    return cached_call(_signature, *key)


@lru_cache(maxsize=1 << 14)  # layers repeat a few signatures: one string each, built once
def _signature(domain: str, op_type: str, input_shapes: tuple[Shape | None, ...],
               input_dtypes: tuple[str, ...], output_shapes: tuple[Shape | None, ...],
               output_dtypes: tuple[str, ...]) -> str:
    ins = ",".join(_shape_text(s, d) for s, d in zip(input_shapes, input_dtypes))
    outs = ",".join(_shape_text(s, d) for s, d in zip(output_shapes, output_dtypes))
    return f"{domain + '.' if domain else ''}{op_type}({ins})->({outs})"


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
    """One layer's record (called per layer per target); its metrics are a view."""
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
        metrics=LayerMetrics(layer, cost),
        fused_into=cost.fused_into,
        fused_ops=cost.fused_ops,
        precision=cost.precision,
    )


# The layer metrics, in record order: read from the layer's profile, from its cost, then
# derived. One list of names serves both a single lookup and the whole dict.
_FROM_PROFILE = ("macs", "flops", "param_count", "param_bytes", "input_bytes", "output_bytes",
                 "arithmetic_intensity", "param_reuse")
_FROM_COST = ("cycles", "utilization", "compute_s", "memory_s", "overhead_s", "latency_s",
              "param_dram_bytes", "act_dram_bytes")
_read_profile = attrgetter(*_FROM_PROFILE)  # a tuple of every field in one C call
_read_cost = attrgetter(*_FROM_COST)
_read_energy = attrgetter(*_ENERGY_PARTS)
_NO_ENERGY = (None,) * len(_ENERGY_PARTS)


def _derived(layer: LayerProfile, cost: LayerCost) -> tuple[Metric, ...]:
    """The metrics after the read ones, in record order: achieved FLOP/s, energy and its parts."""
    energy = cost.energy
    parts = _NO_ENERGY if energy is None else _read_energy(energy)
    return (_achieved(layer.flops, cost.latency_s),
            None if energy is None else energy.total_j, *parts)


_DERIVED = ("achieved_flops_per_s", "energy_j", *_ENERGY_KEYS)
_LAYER_METRIC_NAMES = (*_FROM_PROFILE, *_FROM_COST, *_DERIVED)


def _single(name: str) -> Callable[[LayerProfile, LayerCost], Metric]:
    """The reader of one metric (a record's ``metric(name)``), from the lists above."""
    if name in _FROM_PROFILE:
        return lambda layer, cost, read=attrgetter(name): read(layer)  # type: ignore[misc]
    if name in _FROM_COST:
        return lambda layer, cost, read=attrgetter(name): read(cost)  # type: ignore[misc]
    index = _DERIVED.index(name)
    return lambda layer, cost: _derived(layer, cost)[index]


_LAYER_METRIC_READERS = {name: _single(name) for name in _LAYER_METRIC_NAMES}
# The metrics in sorted name order, and where each sits in record order: a sorted dict is
# built for every layer on every target (JSON rows, worker records) without sorting it.
_SORTED_METRIC_NAMES = tuple(sorted(_LAYER_METRIC_NAMES))
_in_sorted_order = itemgetter(*(_LAYER_METRIC_NAMES.index(n) for n in _SORTED_METRIC_NAMES))


class LayerMetrics(Mapping[str, Metric]):
    """A layer record's metrics, read from its (immutable) profile and cost when asked.

    Why a view rather than a dict: a dict of 24 metrics per layer per target was
    the largest allocation of a big model's analysis (about 1 kB a layer) and most
    of its values are never read (the profile table reads none). It behaves as the
    dict did: same keys in the same order, same values, equal to that dict;
    ``gate.records.canonical_run`` and the JSON writers turn it into a plain dict.
    """

    __slots__ = ("_cost", "_layer")

    def __init__(self, layer: LayerProfile, cost: LayerCost) -> None:
        self._layer = layer
        self._cost = cost

    def __getitem__(self, name: str) -> Metric:
        return _LAYER_METRIC_READERS[name](self._layer, self._cost)

    def __iter__(self) -> Iterator[str]:
        return iter(_LAYER_METRIC_NAMES)

    def __len__(self) -> int:
        return len(_LAYER_METRIC_NAMES)

    def __contains__(self, name: object) -> bool:
        return name in _LAYER_METRIC_READERS

    def _values(self) -> tuple[Metric, ...]:
        """Every metric in record order, read at once (three C-level reads, not a call per
        metric: these are read for every layer and side sent between processes and
        written as JSON)."""
        layer, cost = self._layer, self._cost
        return (*_read_profile(layer), *_read_cost(cost), *_derived(layer, cost))

    def as_dict(self) -> dict[str, Metric]:
        """The dict this view stands for."""
        return dict(zip(_LAYER_METRIC_NAMES, self._values()))

    def sorted_dict(self) -> dict[str, Metric]:
        """``dict(sorted(self.items()))``, without the sort (``gate.records.sorted_metrics``)."""
        return dict(zip(_SORTED_METRIC_NAMES, _in_sorted_order(self._values())))

    def items(self) -> ItemsView[str, Metric]:
        return self.as_dict().items()  # one pass, not a lookup per key (JSON writes them all)

    def values(self) -> ValuesView[Metric]:
        return self.as_dict().values()

    def __eq__(self, other: object) -> bool:
        if isinstance(other, Mapping):
            return self.as_dict() == dict(other.items())
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]  # like a dict: unhashable

    def __repr__(self) -> str:
        return repr(self.as_dict())

    def __reduce__(self) -> tuple[type[dict[str, Metric]], tuple[dict[str, Metric]]]:
        return dict, (self.as_dict(),)  # pickled as the plain dict it stands for


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
