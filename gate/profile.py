"""Target-independent per-layer profile of a model: counts, bytes, intensity, coverage.

``profile_model`` walks the loaded graph once, calls each layer's cost function
and returns one immutable ``ModelProfile``. Target costs (cycles, latency,
energy) are computed from it by ``gate.costmodel``; reporters only format.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from math import prod

from gate.errors import InputError, InternalError
from gate.model.convert import UNKNOWN_DIM
from gate.model.graph import DTYPE_BITS, FLOAT_DTYPES, LoadedModel, Node, Shape, TensorInfo
from gate.ops.registry import OpWork, Unmodelled, cost_function_for
from gate.targets.spec import PRECISION_BITS, normal_precision


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
    When some unmodelled node's output size is itself unknown, its work cannot be
    bounded at all; the share then falls back to at most the node share, so a model
    the tool cannot size never reads as nearly fully covered (fail closed).
    """

    nodes_total: int
    nodes_modelled: int
    work_modelled: int
    work_unmodelled_estimate: int
    unmodelled: tuple[UnmodelledOp, ...]
    unsized_unmodelled_nodes: int = 0  # unmodelled nodes whose output size is unknown

    @property
    def node_share(self) -> float:
        return self.nodes_modelled / self.nodes_total if self.nodes_total else 1.0

    @property
    def work_share(self) -> float:
        total = self.work_modelled + self.work_unmodelled_estimate
        share = self.work_modelled / total if total else self.node_share
        if self.unsized_unmodelled_nodes:
            return min(share, self.node_share)
        return share


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
    """Profile every layer of ``model``; ``precision`` overrides byte counts, never MACs.

    ``precision`` is a deploy precision (``int4``, ``int8``, ``int16``, ``fp8``,
    ``fp16``, ``bf16``, ``fp32`` and their aliases) applied to every floating-point
    tensor's bytes (parameters and activations); integer tensors keep their own
    size. ``None`` or ``"native"`` counts every tensor at its exported dtype.
    Shared parameters count once in the model totals; each layer counts what it reads.
    """
    override_bits = _override_bits(precision)
    _ensure_ops_registered()
    seen_params: dict[str, int] = {}  # parameter name -> element count (first sighting)
    param_bytes_by_name: dict[str, int] = {}
    unbound: dict[str, int] = {}  # symbolic dim -> layers it kept unmodelled
    layers = tuple(_profile_layer(node, override_bits, seen_params, param_bytes_by_name, unbound)
                   for node in model.graph.nodes)
    modelled = [layer for layer in layers if layer.modelled]
    return ModelProfile(
        model=model,
        precision=_precision_label(precision),
        layers=layers,
        coverage=_coverage(layers),
        total_macs=sum(layer.macs for layer in modelled),
        total_flops=sum(layer.flops for layer in modelled),
        total_param_count=sum(seen_params.values()),
        total_param_bytes=sum(param_bytes_by_name.values()),
        notes=_notes(model, precision, override_bits, unbound),
    )


# ------------------------------------------------------------------ precision

def _precision_label(precision: str | None) -> str:
    if precision is None or precision.strip().lower() in ("", "native"):
        return "native"
    return normal_precision(precision) or precision


def _override_bits(precision: str | None) -> int | None:
    """Bits per floating-point element at the deploy precision, or None for native."""
    label = _precision_label(precision)
    if label == "native":
        return None
    if label not in PRECISION_BITS:
        names = ", ".join(("native", *sorted(PRECISION_BITS)))
        raise InputError(f"unknown precision '{precision}'; use one of {names}")
    return PRECISION_BITS[label]


def _tensor_bytes(tensor: TensorInfo, override_bits: int | None) -> int | None:
    """Storage bytes at the deploy precision (floating tensors only), None when unknown."""
    shape = tensor.shape
    if shape is None:
        return None
    count = 1
    for dim in shape:
        if dim.__class__ is not int:
            return None
        count *= dim
    bits = DTYPE_BITS.get(tensor.dtype, 0)
    if bits == 0:
        return None
    if override_bits is not None and tensor.dtype in FLOAT_DTYPES:
        bits = override_bits
    return (count * bits + 7) // 8


# ------------------------------------------------------------------ one layer

def _ensure_ops_registered() -> None:
    import gate.ops  # noqa: F401  (importing registers every cost function)


def _layer_params(node: Node) -> dict[str, TensorInfo]:
    """Parameters the layer reads: its own, plus those read inside its subgraphs."""
    params: dict[str, TensorInfo] = {}
    stack = [node]
    while stack:
        current = stack.pop()
        for position in sorted(current.param_inputs):
            tensor = current.inputs[position] if position < len(current.inputs) else None
            if tensor is not None:
                params.setdefault(tensor.name, tensor)
        for graph in current.subgraphs.values():
            stack.extend(reversed(graph.nodes))
    return params


def _shape_problem(node: Node, unbound: dict[str, int]) -> str:
    """Why the layer's tensors cannot be sized, or "" when all are static."""
    symbolic: list[str] = []
    other = ""
    tensors = [t for t in node.inputs if t is not None] + [t for t in node.outputs if t.name]
    for tensor in tensors:
        if tensor.shape is None:
            other = other or f"shape of tensor '{tensor.name}' was not inferred"
            continue
        for dim in tensor.shape:
            if isinstance(dim, str):
                if dim == UNKNOWN_DIM:
                    other = other or f"tensor '{tensor.name}' has a dim shape inference left unknown"
                elif dim not in symbolic:
                    symbolic.append(dim)
        if tensor.bits_per_element == 0 and tensor.shape is not None:
            other = other or f"tensor '{tensor.name}' has element type {tensor.dtype} (no fixed size)"
    if symbolic:
        for dim in symbolic:
            unbound[dim] = unbound.get(dim, 0) + 1
        binds = " ".join(f"--dim {d}=N" for d in symbolic)
        names = ", ".join(f"'{d}'" for d in symbolic)
        return f"symbolic dim {names} unbound: bind it with {binds}"
    return other


def _work(node: Node, unbound: dict[str, int]) -> tuple[OpWork | None, str]:
    func = cost_function_for(node.domain, node.op_type)
    if func is None:
        where = f" (domain '{node.domain}')" if node.domain else ""
        return None, f"no cost model for op type {node.op_type}{where}"
    problem = _shape_problem(node, unbound)
    if problem:
        return None, problem
    try:
        return func(node), ""
    except Unmodelled as exc:
        return None, exc.reason or "not modelled"
    except Exception as exc:  # a cost-function bug must not read as a result
        raise InternalError(f"cost function for {node.op_type} failed on layer '{node.name}' "
                            f"({type(exc).__name__}: {exc}); rerun with --debug and report "
                            f"it") from exc


def _sum_bytes(tensors: Iterable[TensorInfo], override_bits: int | None) -> int:
    total = 0
    for tensor in tensors:
        total += _tensor_bytes(tensor, override_bits) or 0
    return total


def _profile_layer(node: Node, override_bits: int | None, seen_params: dict[str, int],
                   param_bytes_by_name: dict[str, int], unbound: dict[str, int]) -> LayerProfile:
    params = _layer_params(node)
    for name, tensor in params.items():
        if name not in seen_params:
            seen_params[name] = tensor.numel or 0
            param_bytes_by_name[name] = _tensor_bytes(tensor, override_bits) or 0
    activations = {t.name: t for i, t in enumerate(node.inputs)
                   if t is not None and i not in node.param_inputs and t.name not in params}
    work, reason = _work(node, unbound)
    return LayerProfile(
        index=node.index,
        name=node.name,
        op_type=node.op_type,
        domain=node.domain,
        input_shapes=tuple(None if t is None else t.shape for t in node.inputs),
        input_dtypes=tuple("" if t is None else t.dtype for t in node.inputs),
        output_shapes=tuple(t.shape for t in node.outputs),
        output_dtypes=tuple(t.dtype for t in node.outputs),
        param_names=tuple(params),
        param_count=sum(seen_params[name] for name in params),
        param_bytes=_sum_bytes(params.values(), override_bits),
        input_bytes=_sum_bytes(activations.values(), override_bits),
        output_bytes=_sum_bytes((t for t in node.outputs if t.name), override_bits),
        macs=work.macs if work else 0,
        flops=work.flops if work else 0,
        modelled=work is not None,
        unmodelled_reason=reason,
        work=work,
    )


# ------------------------------------------------------------------ coverage and notes

def _coverage(layers: tuple[LayerProfile, ...]) -> Coverage:
    groups: dict[tuple[str, str, str], int] = {}
    work_unmodelled = 0
    unsized = 0
    for layer in layers:
        if layer.modelled:
            continue
        key = (layer.op_type, layer.domain, layer.unmodelled_reason)
        groups[key] = groups.get(key, 0) + 1
        elements = sum(_numel(shape) for shape in layer.output_shapes)
        work_unmodelled += max(1, elements)  # an unmodelled layer always lowers coverage
        unsized += any(not _is_sized(shape) for shape in layer.output_shapes)
    unmodelled = tuple(UnmodelledOp(op, domain, count, reason) for (op, domain, reason), count
                       in sorted(groups.items(), key=lambda item: (-item[1], item[0])))
    modelled = [layer for layer in layers if layer.modelled]
    return Coverage(
        nodes_total=len(layers),
        nodes_modelled=len(modelled),
        work_modelled=sum(layer.macs for layer in modelled),
        work_unmodelled_estimate=work_unmodelled,
        unmodelled=unmodelled,
        unsized_unmodelled_nodes=unsized,
    )


def _is_sized(shape: Shape | None) -> bool:
    return shape is not None and all(isinstance(d, int) and d >= 0 for d in shape)


def _numel(shape: Shape | None) -> int:
    if shape is None or any(isinstance(d, str) for d in shape):
        return 0
    return prod(shape)  # type: ignore[arg-type]


def _notes(model: LoadedModel, precision: str | None, override_bits: int | None,
           unbound: dict[str, int]) -> tuple[str, ...]:
    notes = [f"symbolic dim '{dim}' unbound: bind it with --dim {dim}=N ({count} layers "
             f"unmodelled)" for dim, count in sorted(unbound.items())]
    if override_bits is not None:
        notes.append(f"floating-point tensors counted at {_precision_label(precision)} "
                     f"({override_bits} bits) as deployed; MACs unchanged")
    notes.extend(model.warnings)
    return tuple(notes)
