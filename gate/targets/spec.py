"""The target profile: what the cost model knows of an accelerator (loaded from YAML).

A ``TargetProfile`` is immutable plain data. The first block of fields is the
contract other modules rely on (records, reports); the rest is what the cost
model needs: per-precision MAC rates and energies, per-byte energies, the
vector unit and host that run non-GEMM work, per-layer overheads and the op
placement. ``gate/targets/loader.py`` builds it from a YAML file and the README
documents every key.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

from gate.errors import InputError

DATAFLOWS = ("weight-stationary", "output-stationary", "matrix-vector", "vector")
ENGINES = ("array", "vector", "host")

# Placement keys that name a kind of convolution rather than an op type: a depthwise
# conv (one input channel per group) and any other grouped conv (group > 1).
CONV_KINDS: Mapping[str, str] = MappingProxyType({
    "depthwise": "depthwise-conv", "grouped": "grouped-conv",
})

# What a target's compiler may fuse (``fusion:``), by role. Producers head a fused
# group (layers with GEMMs); fold ops are per-channel affine ops with constant
# operands folded into the producer's weights at compile time; epilogue ops run
# element by element on the producer's output before it is written.
FUSION_PRODUCERS: tuple[str, ...] = (
    "Conv", "ConvTranspose", "ConvInteger", "QLinearConv", "Gemm", "MatMul", "MatMulInteger",
    "QLinearMatMul",
)
FUSION_FOLDS: tuple[str, ...] = ("BatchNormalization", "Mul", "Add", "Sub", "Div")
FUSION_EPILOGUES: tuple[str, ...] = (
    "Relu", "Clip", "HardSwish", "HardSigmoid", "Sigmoid", "LeakyRelu", "PRelu", "Tanh", "Elu",
    "Selu", "Gelu", "Add", "QuantizeLinear", "DequantizeLinear", "Cast",
)
EPILOGUE_ENGINES = ("output-path", "vector")

# Precision names a profile may declare, with their element size in bits.
PRECISION_BITS: Mapping[str, int] = MappingProxyType({
    "int4": 4, "int8": 8, "int16": 16, "fp8": 8, "fp16": 16, "bf16": 16, "fp32": 32,
})

# Spellings users and ONNX dtypes use for the same precision.
_PRECISION_ALIASES: Mapping[str, str] = MappingProxyType({
    "int4": "int4", "uint4": "int4", "int8": "int8", "uint8": "int8", "int16": "int16",
    "uint16": "int16", "fp8": "fp8", "float8": "fp8", "float8e4m3fn": "fp8",
    "float8e4m3fnuz": "fp8", "float8e5m2": "fp8", "float8e5m2fnuz": "fp8", "fp16": "fp16",
    "float16": "fp16", "half": "fp16", "bf16": "bf16", "bfloat16": "bf16", "fp32": "fp32",
    "float32": "fp32", "float": "fp32",
})


def normal_precision(name: str) -> str | None:
    """The canonical precision name for a user spelling or ONNX dtype ('FLOAT' -> 'fp32'), or None."""
    return _PRECISION_ALIASES.get(name.strip().lower())


@dataclass(frozen=True, slots=True)
class PrecisionSpec:
    """How the PE array runs one precision."""

    macs_per_pe_per_cycle: float  # 1 = one MAC per PE per cycle; 0.5 = one every two cycles
    mac_energy_j: float  # energy of one multiply-accumulate at this precision


@dataclass(frozen=True, slots=True)
class EngineSpec:
    """A non-array engine (vector unit or host CPU): its throughput, energy and overhead."""

    ops_per_cycle: float
    clock_hz: float
    op_energy_j: float  # energy per elementwise operation (or per MAC run here)
    overhead_s: float  # fixed cost per layer run on this engine (dispatch, synchronisation)

    @property
    def ops_per_s(self) -> float:
        return self.ops_per_cycle * self.clock_hz


@dataclass(frozen=True, slots=True)
class FusionSpec:
    """Which producer + epilogue patterns the target's compiler fuses into one layer."""

    producers: frozenset[str]  # op types that head a group ('domain:OpType' for other domains)
    fold: frozenset[str] = frozenset()  # folded into the producer's weights: no work left
    epilogue: frozenset[str] = frozenset()  # run on the producer's output path
    epilogue_engine: str = "output-path"  # "output-path" (free in time) or "vector" (overlapped)
    max_epilogue_ops: int = 2  # epilogue ops one group may take
    pad_into_conv: bool = False  # a constant Pad feeding a conv becomes the conv's padding


@dataclass(frozen=True, slots=True)
class TargetProfile:
    name: str
    description: str
    source: str  # "builtin" or the file path it was loaded from
    clock_hz: float
    pe_rows: int
    pe_cols: int
    dataflow: str  # "weight-stationary", "output-stationary", "matrix-vector", "vector"
    param_buffer_bytes: int  # 0 when the buffer is unified
    activation_buffer_bytes: int  # 0 when the buffer is unified
    unified_buffer_bytes: int  # 0 when buffers are separate
    dram_bytes_per_s: float
    # --- cost-model fields (defaults keep hand-built profiles in other tests short) ---
    precisions: Mapping[str, PrecisionSpec] = field(default_factory=dict)
    buffer_energy_j_per_byte: float = 0.0  # one byte read from or written to an on-chip buffer
    noc_energy_j_per_byte: float = 0.0  # one byte moved over one PE-array link
    dram_energy_j_per_byte: float = 0.0  # one byte read from or written to DRAM
    static_power_w: float = 0.0
    layer_overhead_s: float = 0.0  # fixed cost of every layer run on the array
    vector: EngineSpec | None = None  # None: non-GEMM work goes to the host
    host: EngineSpec | None = None
    placement: Mapping[str, str] = field(default_factory=dict)  # op type -> engine
    weights_resident: bool = False  # keep all parameters on chip across inferences when they fit
    fusion: FusionSpec | None = None  # None: every layer runs alone (layer by layer)
    # Figures far outside what edge accelerators use (most likely a wrong unit): shown as
    # notes on every record costed on this target, never silently accepted.
    warnings: tuple[str, ...] = ()

    @property
    def pe_count(self) -> int:
        return self.pe_rows * self.pe_cols

    @property
    def is_unified(self) -> bool:
        return self.unified_buffer_bytes > 0

    def precision_spec(self, precision: str) -> PrecisionSpec:
        """The array's figures at ``precision``; InputError naming target and precision if absent."""
        canonical = normal_precision(precision) or precision
        spec = self.precisions.get(canonical)
        if spec is None:
            supported = ", ".join(self.precisions) or "none"
            raise InputError(
                f"target '{self.name}' does not run {canonical} on its {self.dataflow} array "
                f"(it supports: {supported}); choose a supported precision (--precision) or "
                f"another target", path=None if self.source == "builtin" else self.source)
        return spec

    def supports(self, precision: str) -> bool:
        return (normal_precision(precision) or precision) in self.precisions

    def peak_flops_per_s(self, precision: str) -> float:
        """2 FLOP per MAC x PEs x MACs per PE per cycle x clock: the array's compute roof."""
        spec = self.precision_spec(precision)
        return 2.0 * self.pe_count * spec.macs_per_pe_per_cycle * self.clock_hz

    def peak_flops_per_j(self, precision: str) -> float:
        """FLOP per joule with the array at peak, paying only MAC energy and static power."""
        spec = self.precision_spec(precision)
        flops_per_s = self.peak_flops_per_s(precision)
        power_w = flops_per_s / 2.0 * spec.mac_energy_j + self.static_power_w
        return flops_per_s / power_w if power_w > 0 else 0.0

    def ridge_flop_per_byte(self, precision: str) -> float:
        """Roofline ridge point: peak FLOP/s over DRAM bytes/s (Williams et al., CACM 2009)."""
        if self.dram_bytes_per_s <= 0:
            return 0.0
        return self.peak_flops_per_s(precision) / self.dram_bytes_per_s

    @staticmethod
    def element_bytes(precision: str) -> float:
        """Bytes per element at ``precision`` (0.5 for int4)."""
        return PRECISION_BITS[normal_precision(precision) or precision] / 8.0

    @property
    def param_capacity_bytes(self) -> int:
        return self.param_buffer_bytes or self.unified_buffer_bytes

    @property
    def activation_capacity_bytes(self) -> int:
        return self.activation_buffer_bytes or self.unified_buffer_bytes

    def engine_for(self, op_type: str, domain: str, has_gemms: bool, conv_kind: str = "") -> str:
        """Where a layer runs: placement first, then GEMMs on the array, the rest on the vector unit or host.

        ``conv_kind`` ("depthwise", "grouped" or "") lets a placement of
        ``depthwise-conv`` or ``grouped-conv`` decide before the op type; a
        depthwise conv falls back to ``grouped-conv`` when only that is placed.
        """
        placed = self._conv_kind_placement(conv_kind)
        if placed is None:
            placed = self.placement.get(f"{domain}:{op_type}" if domain else op_type)
        if placed is None:
            placed = "array" if has_gemms else "vector"
        if placed == "array" and not has_gemms:
            placed = "vector"
        if placed == "vector" and self.vector is None:
            placed = "host"
        return placed

    def _conv_kind_placement(self, conv_kind: str) -> str | None:
        if not conv_kind:
            return None
        kinds = ("depthwise", "grouped") if conv_kind == "depthwise" else (conv_kind,)
        for kind in kinds:
            placed = self.placement.get(CONV_KINDS[kind])
            if placed is not None:
                return placed
        return None
