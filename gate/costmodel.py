"""Per-layer cost of a profiled model on one target: cycles, utilization, traffic, latency, energy.

Analytical, not measured: GEMM mapping onto the PE array per dataflow
(``gate.targets.dataflow``), DRAM traffic from buffer fit, latency from the
roofline overlap (max(compute, memory) + overhead; Williams, Waterman &
Patterson, CACM 2009), energy from per-access costs. docs/costmodel.md documents
every formula. All arithmetic is closed form per layer: costing N targets costs
N times one target.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from functools import lru_cache
from math import ceil
from operator import attrgetter
from typing import Any, TypeVar

from gate.errors import InputError, InternalError
from gate.fusion import NO_FUSION, FusedGroup, FusionPlan, plan_fusion
from gate.ops.registry import GemmShape
from gate.precision import DEPLOYED_LABEL, INTEGER_PRECISIONS
from gate.profile import LayerProfile, ModelProfile
from gate.targets.dataflow import GemmMapping, map_gemm
from gate.targets.spec import DATAFLOWS, EngineSpec, TargetProfile, normal_precision

# The engine of a layer run inside a fused group (its cost is on the group's head); distinct
# from the profile role "qdq-absorbed" (a quantize/dequantize node absorbed by precision).
FUSION_MEMBER = "fusion-member"


@dataclass(frozen=True, slots=True)
class EnergyBreakdown:
    """Energy by component in joules; the parts sum to ``total_j``. Adds up with ``sum()``."""

    mac_j: float = 0.0  # arithmetic: MACs on the array plus operations on the vector unit or host
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
        return EnergyBreakdown(self.mac_j + other.mac_j, self.buffer_j + other.buffer_j,
                               self.noc_j + other.noc_j, self.dram_param_j + other.dram_param_j,
                               self.dram_act_j + other.dram_act_j,
                               self.static_j + other.static_j)

    def __radd__(self, other: object) -> EnergyBreakdown:
        if other == 0:  # lets sum() start from its default 0
            return self
        return NotImplemented

    def as_dict(self) -> dict[str, float]:
        return {"mac_j": self.mac_j, "buffer_j": self.buffer_j, "noc_j": self.noc_j,
                "dram_param_j": self.dram_param_j, "dram_act_j": self.dram_act_j,
                "static_j": self.static_j}


@dataclass(frozen=True, slots=True)
class LayerCost:
    """One layer on one target.

    Unknown is never zero: a layer the profile could not count (``modelled`` False)
    has every time, traffic and energy figure None; only what its known byte counts
    decide (whether its parameters fit) is reported.
    """

    index: int
    name: str
    engine: str  # "array", "vector", "host", FUSION_MEMBER (costed in its group's head), "none"
    cycles: int | None  # engine cycles for the compute (0 for none)
    utilization: float | None  # useful MACs / (PE count x MACs per PE per cycle x cycles); 0 off the array
    compute_s: float | None
    memory_s: float | None  # DRAM time for this layer's traffic
    overhead_s: float | None
    latency_s: float | None  # max(compute_s, memory_s) + overhead_s
    bound: str  # "compute", "memory", "overhead", or "none"
    param_dram_bytes: int | None  # parameter bytes read from DRAM per inference
    act_dram_bytes: int | None  # activation spill traffic (writes + reads) per inference
    buffer_bytes: int | None  # on-chip buffer traffic
    params_fit: bool  # the layer's parameters fit the parameter (or unified) buffer
    activations_fit: bool | None  # its input + output activations fit (None: their size unknown)
    energy: EnergyBreakdown | None
    precision: str = ""  # precision the layer ran at ("" when it ran nowhere)
    array_macs: int = 0  # useful MACs done on the PE array
    modelled: bool = True  # False: the profile could not count this layer (figures None)
    fused_into: str = ""  # the head layer of the fused group this layer runs in ("" when alone)
    fused_ops: tuple[str, ...] = ()  # a head's absorbed layers' op types, in chain order


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
    notes: tuple[str, ...] = ()

    @property
    def inferences_per_s(self) -> float:
        return 1.0 / self.latency_s if self.latency_s > 0 else 0.0


@dataclass(frozen=True, slots=True)
class _Context:
    """What every layer's costing needs from the model-level decisions."""

    target: TargetProfile
    explicit_precision: str | None  # the deploy precision, when one was asked for
    model_precision: str
    weights_resident: bool
    total_param_bytes: int
    shared_params_resident: bool  # parameters read by several layers stay on chip between reads
    # array layers costed so far, by everything their cost depends on (see ``_on_array``)
    array_costs: dict[tuple[Any, ...], LayerCost] = field(default_factory=dict, compare=False)


def cost_model(profile: ModelProfile, target: TargetProfile,
               weights_resident: bool | None = None, fusion: bool = True) -> ModelCost:
    """Cost every layer of ``profile`` on ``target``.

    ``weights_resident`` overrides the target's ``weights_resident`` setting
    (keep all parameters on chip across inferences when they fit). ``fusion``
    False costs layer by layer even when the target declares ``fusion:``.
    """
    _check_target(target)
    explicit = _explicit_precision(profile.precision)
    model_precision = explicit or _dominant_precision(profile, target)
    target.precision_spec(model_precision)  # InputError naming target and precision
    wanted = target.weights_resident if weights_resident is None else weights_resident
    resident = wanted and _weights_fit_on_chip(profile, target)
    ctx = _Context(target, explicit, model_precision, resident, profile.total_param_bytes,
                   profile.shared_param_bytes <= target.param_capacity_bytes)
    plan = NO_FUSION
    if fusion and target.fusion is not None:
        plan = plan_fusion(profile, target.fusion, lambda layer: layer_engine(layer, target))
    layers = tuple(_cost_in_plan(layer, ctx, plan, profile) for layer in profile.layers)
    return _totals(profile, target, ctx, layers, wanted, plan)


def _check_target(target: TargetProfile) -> None:
    """Refuse a hand-built profile the arithmetic would divide by zero on."""
    for what, value in (("clock", target.clock_hz), ("DRAM bandwidth", target.dram_bytes_per_s),
                        ("PE count", target.pe_count)):
        if value <= 0:
            raise InputError(f"target '{target.name}' has no {what} (got {value}); declare one "
                             f"above zero")
    if target.dataflow not in DATAFLOWS:
        raise InputError(f"target '{target.name}' has unknown dataflow '{target.dataflow}'; "
                         f"use one of {', '.join(DATAFLOWS)}")


# ---------------------------------------------------------------- precision

def _explicit_precision(precision: str) -> str | None:
    if not precision or precision in ("native", DEPLOYED_LABEL):
        return None
    canonical = normal_precision(precision)
    if canonical is None:
        raise InputError(f"unknown precision '{precision}'; use one of int4, int8, int16, fp8, "
                         f"fp16, bf16, fp32")
    return canonical


def _layer_native_precision(layer: LayerProfile) -> str | None:
    """The precision the profile read from the graph; for a hand-built profile, its dtypes."""
    if layer.precision:
        return layer.precision
    for dtype in layer.input_dtypes[:1] + layer.output_dtypes[:1]:
        canonical = normal_precision(dtype)
        if canonical is not None:
            return canonical
    return None


def _dominant_precision(profile: ModelProfile, target: TargetProfile) -> str:
    """The native precision carrying the most MACs (or, with no MACs, the most layers)."""
    weight: dict[str, int] = {}
    for layer in profile.layers:
        if layer.role != "layer":
            continue
        native = _layer_native_precision(layer)
        if native is not None:
            weight[native] = weight.get(native, 0) + max(layer.counted_macs, 0) * 1000 + 1
    if not weight:
        return next(iter(target.precisions), "fp32")
    return max(sorted(weight), key=lambda name: weight[name])


def _layer_precision(layer: LayerProfile, ctx: _Context) -> str:
    return ctx.explicit_precision or _layer_native_precision(layer) or ctx.model_precision


# ---------------------------------------------------------------- buffers

def _weights_fit_on_chip(profile: ModelProfile, target: TargetProfile) -> bool:
    total = profile.total_param_bytes
    if target.is_unified:
        largest_act = max((sum(layer.sized) for layer in profile.layers if layer.modelled),
                          default=0)
        return total + largest_act <= target.unified_buffer_bytes
    return total <= target.param_buffer_bytes


def _fits(layer: LayerProfile, ctx: _Context) -> tuple[bool, bool]:
    """(params fit, activations fit) for a layer run on the accelerator (sizes known)."""
    params_fit, acts_fit = _fit_if_known(layer, ctx)
    if acts_fit is None:
        raise InternalError(f"layer '{layer.name}' is costed but a tensor size is unknown")
    return params_fit, acts_fit


def _fit_if_known(layer: LayerProfile, ctx: _Context) -> tuple[bool, bool | None]:
    """(params fit, activations fit); the latter None when an activation's size is unknown."""
    target = ctx.target
    act_bytes = (None if layer.input_bytes is None or layer.output_bytes is None
                 else layer.input_bytes + layer.output_bytes)
    if not target.is_unified:
        params_fit = ctx.weights_resident or layer.param_bytes <= target.param_buffer_bytes
        room = target.activation_buffer_bytes
    else:
        held = ctx.total_param_bytes if ctx.weights_resident else layer.param_bytes
        params_fit = held <= target.unified_buffer_bytes
        room = target.unified_buffer_bytes - (held if params_fit else 0)
    return params_fit, None if act_bytes is None else act_bytes <= room


def _param_dram_bytes(layer: LayerProfile, ctx: _Context, params_fit: bool,
                      maps: list[tuple[GemmMapping, bool]], gemm_weight_elems: int) -> int:
    """Once per inference when the parameters fit; else every read the dataflow makes.

    A parameter read by several layers is fetched once, by its first reader, when all
    such shared parameters fit the parameter buffer together (they stay resident
    between reads); otherwise every reader fetches it again.
    """
    if layer.param_bytes <= 0 or ctx.weights_resident:
        return 0
    if params_fit and ctx.shared_params_resident:
        return layer.first_read_param_bytes
    if params_fit or layer.param_count <= 0:
        return layer.param_bytes
    fetched = sum(m.weight_fetches for m, is_param in maps if is_param)
    distinct = min(layer.param_count, gemm_weight_elems)
    extra_elems = max(0, fetched - distinct)
    return layer.param_bytes + ceil(extra_elems * layer.param_bytes / layer.param_count)


# ---------------------------------------------------------------- fused groups

def _cost_in_plan(layer: LayerProfile, ctx: _Context, plan: FusionPlan,
                  profile: ModelProfile) -> LayerCost:
    """A layer alone, a fused group's head (costing the whole group), or a fused member."""
    head = plan.head_of_member.get(layer.index)
    if head is not None:
        return _fused_member(layer, profile.layers[head].name)
    group = plan.group_of_head.get(layer.index)
    if group is None:
        return _cost_layer(layer, ctx)
    return _cost_group(layer, group, ctx, profile.layers)


def _fused_member(layer: LayerProfile, head_name: str) -> LayerCost:
    """No time or energy of its own; its tensors stream through the head's output path, so
    the head's buffer fit applies (it is reported as fitting)."""
    return LayerCost(
        index=layer.index, name=layer.name, engine=FUSION_MEMBER, cycles=0, utilization=0.0,
        compute_s=0.0, memory_s=0.0, overhead_s=0.0, latency_s=0.0, bound="none",
        param_dram_bytes=0, act_dram_bytes=0, buffer_bytes=0, params_fit=True,
        activations_fit=True, energy=_NO_ENERGY, fused_into=head_name)


_NO_ENERGY = EnergyBreakdown()


def _cost_group(head: LayerProfile, group: FusedGroup, ctx: _Context,
                layers: tuple[LayerProfile, ...]) -> LayerCost:
    """The group as one layer: its outside inputs read once, its final output written once.

    Folded members add no work, and of their parameters only one per-channel
    vector remains (the producer's new bias). Epilogue element operations run on
    the array's output path or the vector unit; their parameters are read.
    """
    members = [layers[i] for i in group.members]
    kept = [_kept_params(m, m.index in group.folded, head) for m in members]
    sizes = (group.input_bytes, group.output_bytes,  # the group's _SIZE_FIELDS
             head.param_bytes + sum(nbytes for nbytes, _, _ in kept),
             head.first_read_param_bytes + sum(new for _, new, _ in kept),
             head.param_count + sum(count for _, _, count in kept))
    fused_ops = tuple(m.op_type for m in members)
    if layer_engine(head, ctx.target) == "array":  # as the group's layer would run
        key = _array_key(head, sizes, group.epilogue_ops, fused_ops)
        known = ctx.array_costs.get(key)
        if known is not None:  # a group costed before: no layer record built to find it
            return _as_layer(known, head)
    return _cost_layer(_replaced(head, **dict(zip(_SIZE_FIELDS, sizes))), ctx,
                       epilogue_ops=group.epilogue_ops, fused_ops=fused_ops)


def _replaced(record: _Record, **changes: Any) -> _Record:
    """``dataclasses.replace`` for the per-layer records, cheaper: the fields read in one
    call and passed by position (it runs twice per fused group, and ``replace``
    introspects the fields on every call)."""
    cls = type(record)
    known = _FIELDS.get(cls)
    if known is None:
        names = tuple(f.name for f in fields(cls) if f.init)
        known = _FIELDS[cls] = (attrgetter(*names), {name: i for i, name in enumerate(names)})
    read, position = known
    values = list(read(record))
    for name, value in changes.items():
        values[position[name]] = value
    return cls(*values)


_Record = TypeVar("_Record", LayerProfile, LayerCost)
_FIELDS: dict[type, tuple[attrgetter[Any], dict[str, int]]] = {}


def _kept_params(member: LayerProfile, folded: bool,
                 head: LayerProfile) -> tuple[int, int, int]:
    """(bytes, bytes no earlier layer read, count) of a member's parameters the group reads.

    A folded member leaves one per-channel vector, the head's new bias, stored as the
    head stores its parameters: a float BatchNormalization folded into an int8 Conv
    becomes part of an int8 layer, so a QDQ export that leaves BN float costs what
    the same network at ``--precision int8`` costs.
    """
    if not folded:
        return member.param_bytes, member.first_read_param_bytes, member.param_count
    tensors = max(1, len(member.param_names))  # BatchNormalization: 4 vectors fold into 1 bias
    count = ceil(member.param_count / tensors)
    if head.param_count and member.param_bytes:
        nbytes = ceil(count * head.param_bytes / head.param_count)
        return nbytes, ceil(nbytes * member.first_read_param_bytes / member.param_bytes), count
    return (ceil(member.param_bytes / tensors), ceil(member.first_read_param_bytes / tensors),
            count)


# ---------------------------------------------------------------- one layer

def layer_engine(layer: LayerProfile, target: TargetProfile) -> str:
    """Where ``layer`` runs on ``target`` alone: array, vector, host, or none (view, unmodelled)."""
    work = layer.work
    if not layer.modelled or work is None or work.is_view:
        return "none"
    has_gemms = any(g.macs > 0 for g in work.gemms)
    return target.engine_for(layer.op_type, layer.domain, has_gemms, conv_kind(layer))


def _cost_layer(layer: LayerProfile, ctx: _Context, epilogue_ops: int = 0,
                fused_ops: tuple[str, ...] = ()) -> LayerCost:
    """``layer`` on its engine; ``epilogue_ops`` and ``fused_ops`` (the absorbed layers' op
    types) when it stands for a fused group."""
    work = layer.work
    if not layer.modelled or work is None:
        return _unknown(layer, ctx)
    if work.is_view:
        return _idle(layer, ctx)
    target = ctx.target
    engine = layer_engine(layer, target)
    if engine == "array":
        return _on_array(layer, ctx, epilogue_ops, fused_ops)
    spec = target.vector if engine == "vector" else target.host
    if spec is None:
        raise InputError(f"target '{target.name}' declares no {engine} engine for layer "
                         f"'{layer.name}' ({layer.op_type}); add a '{engine}' section",
                         path=None if target.source == "builtin" else target.source)
    ops = work.vector_ops + work.macs
    if ops <= 0 and work.flops > 0:
        ops = work.flops
    cost = _on_engine(layer, ctx, engine, spec, ops + epilogue_ops)
    return _replaced(cost, fused_ops=fused_ops) if fused_ops else cost


def conv_kind(layer: LayerProfile) -> str:
    """"depthwise" (one input channel per group), "grouped" (group > 1) or "" for a layer.

    Any op whose type names a convolution (Conv, ConvInteger, QLinearConv,
    ConvTranspose, ...) with one GEMM shape of ``count`` > 1 groups; its first
    input is the data, channels on axis 1.
    """
    work = layer.work
    if work is None or "Conv" not in layer.op_type or len(work.gemms) != 1:
        return ""
    groups = work.gemms[0].count
    if groups <= 1:
        return ""
    data = layer.input_shapes[0] if layer.input_shapes else None
    channels = data[1] if data is not None and len(data) > 1 else None
    return "depthwise" if channels == groups else "grouped"


def _idle(layer: LayerProfile, ctx: _Context) -> LayerCost:
    """A view: no engine time or energy (known to be none); buffer fit still reported."""
    params_fit, acts_fit = _fits(layer, ctx)
    return LayerCost(
        index=layer.index, name=layer.name, engine="none", cycles=0, utilization=0.0,
        compute_s=0.0, memory_s=0.0, overhead_s=0.0, latency_s=0.0, bound="none",
        param_dram_bytes=0, act_dram_bytes=0, buffer_bytes=0, params_fit=params_fit,
        activations_fit=acts_fit, energy=EnergyBreakdown())


def _unknown(layer: LayerProfile, ctx: _Context) -> LayerCost:
    """A layer the profile could not count: its time, traffic and energy are unknown (None),
    never 0; whether its parameters (and, when sized, activations) fit is still known."""
    params_fit, acts_fit = _fit_if_known(layer, ctx)
    return LayerCost(
        index=layer.index, name=layer.name, engine="none", cycles=None, utilization=None,
        compute_s=None, memory_s=None, overhead_s=None, latency_s=None, bound="none",
        param_dram_bytes=None, act_dram_bytes=None, buffer_bytes=None, params_fit=params_fit,
        activations_fit=acts_fit, energy=None, modelled=False)


def _on_array(layer: LayerProfile, ctx: _Context, epilogue_ops: int = 0,
              fused_ops: tuple[str, ...] = ()) -> LayerCost:
    """A layer on the PE array, costed once per distinct set of inputs to its cost.

    Why: large graphs repeat a few layer shapes, and costing one takes about ten
    microseconds. The key holds every figure of the layer the costing reads (its work,
    precision, operand types and byte counts) and the fused group's op types the cost
    carries; the target is the context's own.
    """
    if layer.input_bytes is None or layer.output_bytes is None:
        return _on_array_once(layer, ctx, epilogue_ops)  # refused inside, naming the layer
    key = _array_key(layer, _sizes(layer), epilogue_ops, fused_ops)
    cost = ctx.array_costs.get(key)
    if cost is None:
        cost = _on_array_once(layer, ctx, epilogue_ops)
        if fused_ops:  # one record per distinct group, not a copy per group costed
            cost = _replaced(cost, fused_ops=fused_ops)
        ctx.array_costs[key] = cost
    return _as_layer(cost, layer)


_SIZE_FIELDS = ("input_bytes", "output_bytes", "param_bytes", "param_new_bytes", "param_count")
_sizes = attrgetter(*_SIZE_FIELDS)


def _array_key(layer: LayerProfile, sizes: tuple[Any, ...], epilogue_ops: int,
               fused_ops: tuple[str, ...]) -> tuple[Any, ...]:
    """What the array cost of ``layer`` depends on: its work, precision and operand types,
    ``sizes`` (its ``_SIZE_FIELDS`` in that order; a fused group's differ from its head's),
    the epilogue and the group's op types."""
    return (layer.work, layer.precision, layer.input_dtypes[:1], layer.output_dtypes[:1],
            *sizes, epilogue_ops, fused_ops)


def _as_layer(cost: LayerCost, layer: LayerProfile) -> LayerCost:
    """A remembered cost under ``layer``'s index and name."""
    if cost.index == layer.index and cost.name == layer.name:
        return cost
    return _replaced(cost, index=layer.index, name=layer.name)


def _on_array_once(layer: LayerProfile, ctx: _Context, epilogue_ops: int) -> LayerCost:
    target = ctx.target
    work = layer.work
    assert work is not None
    precision = _layer_precision(layer, ctx)
    spec = target.precision_spec(precision)
    elem_bytes = target.element_bytes(precision)
    maps = [(_mapped(g, target.pe_rows, target.pe_cols, target.dataflow), g.weights_are_params)
            for g in work.gemms if g.macs > 0]
    weight_elems = sum(g.k * g.n * g.count for g in work.gemms if g.weights_are_params)
    base_cycles = sum(m.cycles for m, _ in maps)
    macs = sum(m.macs for m, _ in maps)
    cycles = ceil(base_cycles / spec.macs_per_pe_per_cycle)
    array_s = cycles / target.clock_hz
    extra_ops = work.vector_ops + max(0, work.macs - macs)
    side_s, side_j = _side_work(target, extra_ops, spec.mac_energy_j)
    epilogue_s, epilogue_j = _epilogue_work(target, epilogue_ops, spec.mac_energy_j)
    params_fit, acts_fit = _fits(layer, ctx)
    param_dram = _param_dram_bytes(layer, ctx, params_fit, maps, weight_elems)
    act_dram = 0 if acts_fit else sum(layer.sized)
    operand_elems = sum(m.weight_reads + m.input_reads + m.output_accesses for m, _ in maps)
    buffer_bytes = ceil(operand_elems * elem_bytes) + param_dram + act_dram
    noc_bytes = sum(m.noc_hops for m, _ in maps) * elem_bytes
    capacity = target.pe_count * spec.macs_per_pe_per_cycle * cycles
    # A separate vector unit overlaps the array; on a vector target it is the same lanes.
    compute_s = (array_s + side_s + epilogue_s if target.dataflow == "vector"
                 else max(array_s, side_s + epilogue_s))
    return _finish(
        layer, ctx, engine="array", cycles=cycles, utilization=macs / capacity if capacity else 0.0,
        compute_s=compute_s, overhead_s=target.layer_overhead_s,
        param_dram=param_dram, act_dram=act_dram, buffer_bytes=buffer_bytes,
        fit=(params_fit, acts_fit), precision=precision, array_macs=macs,
        arithmetic_j=macs * spec.mac_energy_j + side_j + epilogue_j,
        noc_j=noc_bytes * target.noc_energy_j_per_byte)


@lru_cache(maxsize=1 << 14)  # layers repeat a few GEMM shapes; the mapping is pure
def _mapped(gemm: GemmShape, rows: int, cols: int, dataflow: str) -> GemmMapping:
    return map_gemm(gemm, rows, cols, dataflow)


def _side_work(target: TargetProfile, ops: int, mac_energy_j: float) -> tuple[float, float]:
    """Elementwise work fused into an array layer (bias, activation): on the vector unit, overlapped."""
    if ops <= 0:
        return 0.0, 0.0
    if target.vector is None:  # fused into the array's output stage: energy at the MAC rate
        return 0.0, ops * mac_energy_j
    return ops / target.vector.ops_per_s, ops * target.vector.op_energy_j


def _epilogue_work(target: TargetProfile, ops: int, mac_energy_j: float) -> tuple[float, float]:
    """A fused group's epilogue: free in time on the array's output path, else on the vector unit."""
    fusion = target.fusion
    if ops <= 0 or fusion is None:
        return 0.0, 0.0
    if fusion.epilogue_engine == "vector" and target.vector is not None:
        return _side_work(target, ops, mac_energy_j)
    return 0.0, ops * mac_energy_j  # an ALU op in the output stage, charged like a MAC


def _on_engine(layer: LayerProfile, ctx: _Context, engine: str, spec: EngineSpec,
               ops: int) -> LayerCost:
    cycles = ceil(ops / spec.ops_per_cycle) if ops > 0 else 0
    if engine == "host":  # the host reads and writes through DRAM, never the accelerator's buffers
        params_fit, acts_fit = False, False
        param_dram = layer.param_bytes
        act_dram = sum(layer.sized)
        buffer_bytes = 0
    else:
        params_fit, acts_fit = _fits(layer, ctx)
        param_dram = 0 if ctx.weights_resident else (
            layer.first_read_param_bytes if params_fit and ctx.shared_params_resident
            else layer.param_bytes)
        act_dram = 0 if acts_fit else sum(layer.sized)
        buffer_bytes = layer.param_bytes + sum(layer.sized) + param_dram + act_dram
    return _finish(
        layer, ctx, engine=engine, cycles=cycles, utilization=0.0,
        compute_s=cycles / spec.clock_hz, overhead_s=spec.overhead_s, param_dram=param_dram,
        act_dram=act_dram, buffer_bytes=buffer_bytes, fit=(params_fit, acts_fit),
        precision=_layer_precision(layer, ctx), array_macs=0, arithmetic_j=ops * spec.op_energy_j,
        noc_j=0.0)


def _finish(layer: LayerProfile, ctx: _Context, *, engine: str, cycles: int, utilization: float,
            compute_s: float, overhead_s: float, param_dram: int, act_dram: int,
            buffer_bytes: int, fit: tuple[bool, bool], precision: str, array_macs: int,
            arithmetic_j: float, noc_j: float) -> LayerCost:
    """Roofline latency, bound and the energy breakdown of one layer."""
    target = ctx.target
    memory_s = (param_dram + act_dram) / target.dram_bytes_per_s
    latency_s = max(compute_s, memory_s) + overhead_s
    energy = EnergyBreakdown(
        mac_j=arithmetic_j,
        buffer_j=buffer_bytes * target.buffer_energy_j_per_byte,
        noc_j=noc_j,
        dram_param_j=param_dram * target.dram_energy_j_per_byte,
        dram_act_j=act_dram * target.dram_energy_j_per_byte,
        static_j=target.static_power_w * latency_s,
    )
    return LayerCost(
        index=layer.index, name=layer.name, engine=engine, cycles=cycles,
        utilization=utilization, compute_s=compute_s, memory_s=memory_s, overhead_s=overhead_s,
        latency_s=latency_s, bound=_bound(compute_s, memory_s, overhead_s),
        param_dram_bytes=param_dram, act_dram_bytes=act_dram, buffer_bytes=buffer_bytes,
        params_fit=fit[0], activations_fit=fit[1], energy=energy, precision=precision,
        array_macs=array_macs)


def _bound(compute_s: float, memory_s: float, overhead_s: float) -> str:
    if overhead_s > max(compute_s, memory_s):
        return "overhead"
    return "memory" if memory_s > compute_s else "compute"


# ---------------------------------------------------------------- totals

FLOAT_RATE_GAP = 2.0  # an integer rate at least this many times the float rate is "far above"


def _float_rate_note(ctx: _Context) -> str:
    """A float model costed as exported on a target whose integer rate is far above."""
    precision, target = ctx.model_precision, ctx.target
    if ctx.explicit_precision or precision in INTEGER_PRECISIONS:
        return ""
    rate = target.precision_spec(precision).macs_per_pe_per_cycle
    integer = [(spec.macs_per_pe_per_cycle, name) for name, spec in target.precisions.items()
               if name in INTEGER_PRECISIONS]
    if not integer or max(integer)[0] < FLOAT_RATE_GAP * rate:
        return ""
    best_rate, best = max(integer)
    return (f"costed as exported, at {precision}: {target.name} runs {best} at "
            f"{best_rate / rate:g}x the {precision} rate; if the model ships quantized, "
            f"export it quantized (QDQ) or pass --precision {best}")


def _energy_total(costs: list[LayerCost]) -> EnergyBreakdown:
    """The layers' energies added up part by part, in layer order: what ``sum`` of
    ``EnergyBreakdown`` gives (same additions, same order), without an intermediate
    breakdown per layer."""
    mac = buffer = noc = dram_param = dram_act = static = 0.0
    for cost in costs:
        energy = cost.energy
        if energy:
            mac += energy.mac_j
            buffer += energy.buffer_j
            noc += energy.noc_j
            dram_param += energy.dram_param_j
            dram_act += energy.dram_act_j
            static += energy.static_j
    return EnergyBreakdown(mac, buffer, noc, dram_param, dram_act, static)


def _totals(profile: ModelProfile, target: TargetProfile, ctx: _Context,
            layers: tuple[LayerCost, ...], wanted_resident: bool, plan: FusionPlan) -> ModelCost:
    capacity = 0.0
    array_macs = 0
    for cost in layers:
        if cost.engine == "array" and cost.cycles is not None:
            capacity += (target.pe_count * target.precision_spec(cost.precision).macs_per_pe_per_cycle
                         * cost.cycles)
            array_macs += cost.array_macs
    notes = []
    if wanted_resident and not ctx.weights_resident:
        notes.append(f"parameters ({profile.total_param_bytes} B) do not fit on chip: "
                     f"fetched from DRAM every inference")
    float_note = _float_rate_note(ctx)
    if float_note:
        notes.append(float_note)
    if plan.groups:
        notes.append(f"{plan.fused_layers} layer(s) fused into {len(plan.groups)} group(s) as the "
                     f"target's 'fusion:' section declares; --no-fusion costs them layer by layer")
    unmodelled = sum(1 for cost in layers if not cost.modelled)
    if unmodelled:
        notes.append(f"{unmodelled} unmodelled layer(s) have unknown cost ('?'), left out of the "
                     "totals: totals are a lower bound")
    costed = [cost for cost in layers if cost.modelled]
    return ModelCost(
        target_name=target.name,
        precision=ctx.model_precision,
        layers=layers,
        latency_s=sum(cost.latency_s or 0.0 for cost in costed),
        energy=_energy_total(costed),
        param_dram_bytes=sum(cost.param_dram_bytes or 0 for cost in costed),
        act_dram_bytes=sum(cost.act_dram_bytes or 0 for cost in costed),
        weights_resident=ctx.weights_resident,
        utilization=array_macs / capacity if capacity else 0.0,
        peak_flops_per_s=target.peak_flops_per_s(ctx.model_precision),
        peak_flops_per_j=target.peak_flops_per_j(ctx.model_precision),
        notes=tuple(notes),
    )
