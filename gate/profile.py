"""Target-independent per-layer profile of a model: counts, bytes, intensity, coverage.

``profile_model`` walks the loaded graph once, calls each layer's cost function
and returns one immutable ``ModelProfile``. Target costs (cycles, latency,
energy) are computed from it by ``gate.costmodel``; reporters only format.
"""

from __future__ import annotations

from dataclasses import dataclass

from gate.model.graph import LoadedModel, Shape
from gate.ops.registry import OpWork


@dataclass(frozen=True, slots=True)
class LayerProfile:
    """One layer's target-independent figures (bytes at the deploy precision)."""

    index: int
    name: str
    op_type: str
    domain: str
    input_shapes: tuple[Shape | None, ...]
    input_dtypes: tuple[str, ...]
    output_shapes: tuple[Shape | None, ...]
    output_dtypes: tuple[str, ...]
    param_names: tuple[str, ...]  # initializers this layer reads (its parameters)
    param_count: int
    param_bytes: int
    input_bytes: int  # activation inputs (parameters excluded)
    output_bytes: int
    macs: int
    flops: int
    modelled: bool
    unmodelled_reason: str  # "" when modelled
    work: OpWork | None  # None when unmodelled

    @property
    def bytes_moved(self) -> int:
        return self.param_bytes + self.input_bytes + self.output_bytes

    @property
    def arithmetic_intensity(self) -> float:
        """FLOP per byte moved (parameters + input and output activations), as in the roofline model."""
        return self.flops / self.bytes_moved if self.bytes_moved else 0.0

    @property
    def param_reuse(self) -> float:
        """MACs per parameter byte: how often each fetched parameter byte is used."""
        return self.macs / self.param_bytes if self.param_bytes else 0.0


@dataclass(frozen=True, slots=True)
class UnmodelledOp:
    """An op type the profile could not count, how often, and why."""

    op_type: str
    domain: str
    count: int
    reason: str


@dataclass(frozen=True, slots=True)
class Coverage:
    """How much of the model the profile can see.

    ``work_share`` weighs each node by its work: MACs where modelled, and for
    an unmodelled node its output element count as a lower-bound proxy (it must
    at least write each output once), so an unmodelled node always lowers it.
    """

    nodes_total: int
    nodes_modelled: int
    work_modelled: int
    work_unmodelled_estimate: int
    unmodelled: tuple[UnmodelledOp, ...]

    @property
    def node_share(self) -> float:
        return self.nodes_modelled / self.nodes_total if self.nodes_total else 1.0

    @property
    def work_share(self) -> float:
        total = self.work_modelled + self.work_unmodelled_estimate
        return self.work_modelled / total if total else self.node_share


@dataclass(frozen=True, slots=True)
class ModelProfile:
    """The whole model's target-independent profile."""

    model: LoadedModel
    precision: str  # deploy precision the bytes are counted at, or "native"
    layers: tuple[LayerProfile, ...]
    coverage: Coverage
    total_macs: int
    total_flops: int
    total_param_count: int  # shared initializers counted once
    total_param_bytes: int  # shared initializers counted once
    notes: tuple[str, ...] = ()  # e.g. "symbolic dim 'seq' unbound: bind it with --dim seq=N"


def profile_model(model: LoadedModel, precision: str | None = None) -> ModelProfile:
    """Profile every layer of ``model``; ``precision`` overrides byte counts, never MACs."""
    raise NotImplementedError  # implemented by the profiler work
