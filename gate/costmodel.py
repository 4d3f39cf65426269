"""Per-layer cost of a profiled model on one target: cycles, utilization, traffic, latency, energy.

Analytical, not measured: GEMM mapping onto the PE array per dataflow, DRAM
traffic from buffer fit, latency from the roofline overlap
(max(compute, memory) + overhead; Williams, Waterman & Patterson, CACM 2009),
energy from per-access costs. The README documents every formula.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

from gate.profile import ModelProfile
from gate.targets.spec import TargetProfile


@dataclass(frozen=True, slots=True)
class EnergyBreakdown:
    """Energy by component in joules; the parts sum to ``total_j``. Adds up with ``sum()``."""

    mac_j: float = 0.0
    buffer_j: float = 0.0  # on-chip buffer reads and writes
    noc_j: float = 0.0  # distributing operands across the PE array
    dram_param_j: float = 0.0
    dram_act_j: float = 0.0
    static_j: float = 0.0

    @property
    def total_j(self) -> float:
        return (self.mac_j + self.buffer_j + self.noc_j + self.dram_param_j
                + self.dram_act_j + self.static_j)

    def __add__(self, other: EnergyBreakdown) -> EnergyBreakdown:
        return EnergyBreakdown(*(getattr(self, f.name) + getattr(other, f.name)
                                 for f in fields(self)))

    def __radd__(self, other: object) -> EnergyBreakdown:
        if other == 0:  # lets sum() start from its default 0
            return self
        return NotImplemented

    def as_dict(self) -> dict[str, float]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


@dataclass(frozen=True, slots=True)
class LayerCost:
    """One layer on one target."""

    index: int
    name: str
    engine: str  # "array", "vector", "host", or "none" (view op / unmodelled)
    cycles: int  # engine cycles for the compute (0 for none)
    utilization: float  # useful MACs / (PE count x cycles); 0 off the array
    compute_s: float
    memory_s: float  # DRAM time for this layer's traffic
    overhead_s: float
    latency_s: float  # max(compute_s, memory_s) + overhead_s
    bound: str  # "compute", "memory", "overhead", or "none"
    param_dram_bytes: int  # parameter bytes read from DRAM per inference
    act_dram_bytes: int  # activation spill traffic (writes + reads) per inference
    buffer_bytes: int  # on-chip buffer traffic
    params_fit: bool  # the layer's parameters fit the parameter (or unified) buffer
    activations_fit: bool  # its input + output activations fit the activation buffer
    energy: EnergyBreakdown


@dataclass(frozen=True, slots=True)
class ModelCost:
    """A model on one target: every layer plus totals."""

    target_name: str
    precision: str  # precision the array ran at (sets MACs per PE per cycle and energy per MAC)
    layers: tuple[LayerCost, ...]
    latency_s: float
    energy: EnergyBreakdown
    param_dram_bytes: int
    act_dram_bytes: int
    weights_resident: bool  # all parameters stay on chip across inferences
    utilization: float  # useful MACs / (PE count x array cycles), over array layers
    peak_flops_per_s: float
    peak_flops_per_j: float

    @property
    def inferences_per_s(self) -> float:
        return 1.0 / self.latency_s if self.latency_s > 0 else 0.0


def cost_model(profile: ModelProfile, target: TargetProfile) -> ModelCost:
    """Cost every layer of ``profile`` on ``target``."""
    raise NotImplementedError  # implemented by the cost-model work
