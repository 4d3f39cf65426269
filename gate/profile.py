"""Target-independent per-layer profile of a model: counts, bytes, intensity, coverage.

``profile_model`` walks the loaded graph once, calls each layer's cost function
and returns one immutable ``ModelProfile``. Target costs (cycles, latency,
energy) are computed from it by ``gate.costmodel``; reporters only format.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from math import prod
from typing import Any

from gate.errors import InputError, InternalError, near_name
from gate.model.constants import logical_source
from gate.model.convert import UNKNOWN_DIM
from gate.model.graph import (
    DTYPE_BITS,
    FLOAT_DTYPES,
    LoadedModel,
    Node,
    ParamSource,
    Shape,
    StoredTensor,
    TensorInfo,
)
from gate.ops.control import counted_subgraphs
from gate.ops.quantized import QOPERATOR_OPS, requantized
from gate.ops.registry import OpWork, Unmodelled, cost_function_for
from gate.precision import (
    ACCUMULATOR_BITS,
    DEPLOYED_LABEL,
    INTEGER_PRECISIONS,
    deployed_dtypes,
    is_bias,
    layer_precision,
)
from gate.targets.spec import PRECISION_BITS, normal_precision

QDQ_ABSORBED = "qdq-absorbed"  # the role of a quantize/dequantize node absorbed by its neighbours
FOLDED_NOTE = "folded: computed offline from constants (not a layer of the deployed model)"
QDQ_ABSORBED_NOTE = ("qdq-absorbed: activation quantize/dequantize pair absorbed by the layers "
                      "beside it")


@dataclass(frozen=True, slots=True)
class LayerProfile:
    """One layer's target-independent figures (bytes at the deploy precision).

    ``param_bytes`` is what the layer reads of the stored parameters;
    ``param_new_bytes`` the part no earlier layer read (a shared parameter that
    stays resident is fetched once, by its first reader). ``precision`` is the
    precision the layer runs at as deployed (``gate.precision``) or the
    ``--precision`` override. ``role`` is "layer", "folded" (computed offline from
    constants) or "qdq-absorbed" (an activation quantize/dequantize pair the layers
    beside it absorb). Not to be confused with layer fusion (``gate.fusion``): a layer run
    inside a fused group has engine "fusion-member" in its cost, whatever its role.

    Unknown is never zero: ``macs`` and ``flops`` are None when the layer is not
    modelled, ``input_bytes`` / ``output_bytes`` None when a tensor's size is not
    known (an unbound dim), and the figures derived from them None as well. A
    modelled layer has every figure known.
    """

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
    input_bytes: int | None  # activation inputs (parameters excluded); None: a size unknown
    output_bytes: int | None
    macs: int | None  # None: not modelled (unknown, never 0)
    flops: int | None
    modelled: bool
    unmodelled_reason: str  # "" when modelled
    work: OpWork | None  # None when unmodelled
    precision: str = ""
    param_new_bytes: int | None = None  # None: all of param_bytes (a hand-built profile)
    role: str = "layer"

    @property
    def first_read_param_bytes(self) -> int:
        """Parameter bytes no earlier layer read."""
        return self.param_bytes if self.param_new_bytes is None else self.param_new_bytes

    @property
    def bytes_moved(self) -> int | None:
        if self.input_bytes is None or self.output_bytes is None:
            return None
        return self.param_bytes + self.input_bytes + self.output_bytes

    @property
    def arithmetic_intensity(self) -> float | None:
        """FLOP per byte moved (parameters + input and output activations), as in the roofline
        model; None when the FLOPs or the bytes are unknown."""
        moved = self.bytes_moved
        if self.flops is None or moved is None:
            return None
        return self.flops / moved if moved else 0.0

    @property
    def param_reuse(self) -> float | None:
        """MACs per parameter byte: how often each fetched parameter byte is used."""
        if self.macs is None:
            return None
        return self.macs / self.param_bytes if self.param_bytes else 0.0

    @property
    def sized(self) -> tuple[int, int]:
        """(input bytes, output bytes) of a layer whose sizes are known: every modelled layer."""
        if self.input_bytes is None or self.output_bytes is None:
            raise InternalError(f"layer '{self.name}' is costed but a tensor size is unknown")
        return self.input_bytes, self.output_bytes

    @property
    def counted_macs(self) -> int:
        """MACs of a layer that is counted (every modelled layer); 0 for an unmodelled one,
        for sums that skip unknowns on purpose (coverage, the dominant precision)."""
        return self.macs or 0


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
    an unmodelled node an *upper bound* of its work (``unmodelled_work_bound``:
    input elements x output elements), so unmodelled work is never understated
    and an attention or a large contraction cannot hide behind a tiny share.
    When some unmodelled node's input or output size is itself unknown, its work
    cannot be bounded at all; the share then falls back to at most the node
    share, so a model the tool cannot size never reads as nearly fully covered
    (fail closed).
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
    total_param_count: int  # every stored parameter counted once, however many layers read it
    total_param_bytes: int  # the same, in bytes as stored (or at the --precision override)
    notes: tuple[str, ...] = ()  # e.g. "symbolic dim 'seq' unbound: bind it with --dim seq=N"
    shared_param_bytes: int = 0  # stored parameters read by more than one layer

    @property
    def explicit_precision(self) -> bool:
        """True when ``--precision`` overrode the precision read from the graph."""
        return self.precision != DEPLOYED_LABEL


def profile_model(model: LoadedModel, precision: str | None = None) -> ModelProfile:
    """Profile every layer of ``model``; ``precision`` overrides byte counts, never MACs.

    Without ``precision`` each layer is counted as deployed: its precision and its
    tensors' sizes are read from the graph (``gate.precision``), parameters at
    their stored size. ``precision`` (``int4``, ``int8``, ``int16``, ``fp8``,
    ``fp16``, ``bf16``, ``fp32`` and their aliases) is an explicit override:
    every floating-point tensor's bytes at that size, every layer at that
    precision; integer tensors keep their own size. Each stored parameter counts
    once in the model totals; each layer counts what it reads.
    """
    override_bits = _override_bits(precision)
    _ensure_ops_registered()
    label = _precision_label(precision)
    counting = _Counting(override_bits, None if label == DEPLOYED_LABEL else label,
                         deployed_dtypes(model.graph))
    ledger = _ParamLedger(override_bits)
    unbound: dict[str, int] = {}  # symbolic dim -> layers it kept unmodelled
    shared = _sharer()
    layers = tuple(_profile_layer(node, counting, ledger, unbound, shared)
                   for node in model.graph.nodes)
    modelled = [layer for layer in layers if layer.modelled]
    return ModelProfile(
        model=model,
        precision=label,
        layers=layers,
        coverage=_coverage(layers),
        total_macs=sum(layer.counted_macs for layer in modelled),
        total_flops=sum(layer.flops or 0 for layer in modelled),
        total_param_count=ledger.total_count(),
        total_param_bytes=ledger.total_bytes(),
        notes=_notes(model, precision, override_bits, unbound, layers),
        shared_param_bytes=ledger.shared_bytes(),
    )


# ------------------------------------------------------------------ precision

def _precision_label(precision: str | None) -> str:
    if precision is None or precision.strip().lower() in ("", "native", DEPLOYED_LABEL):
        return DEPLOYED_LABEL
    return normal_precision(precision) or precision


def _override_bits(precision: str | None) -> int | None:
    """Bits per floating-point element at the deploy precision, or None for as deployed."""
    label = _precision_label(precision)
    if label == DEPLOYED_LABEL:
        return None
    if label not in PRECISION_BITS:
        names = ", ".join(("native", *sorted(PRECISION_BITS)))
        raise InputError(f"unknown precision '{precision}'; use one of {names}")
    return PRECISION_BITS[label]


@dataclass(frozen=True, slots=True)
class _Counting:
    """How tensors are counted: the override (if any) and the deployed element types."""

    override_bits: int | None
    override: str | None  # the --precision override's canonical name
    deployed: dict[str, str]

    def tensor_bits(self, tensor: TensorInfo) -> int:
        """Bits per element of an activation: the override for floats, else as deployed."""
        if self.override_bits is not None and tensor.dtype in FLOAT_DTYPES:
            return self.override_bits
        return DTYPE_BITS.get(self.deployed.get(tensor.name, tensor.dtype), 0)

    def param_bits(self, tensor: TensorInfo | None, source: ParamSource, bias: bool) -> int:
        """Bits per element of a parameter: the override for floats (a bias at an integer
        override is int32, the accumulator's width), else as stored."""
        exported = tensor.dtype if tensor is not None else source.dtype
        if self.override_bits is not None and (exported in FLOAT_DTYPES
                                               or source.dtype in FLOAT_DTYPES):
            if bias and self.override in INTEGER_PRECISIONS:
                return ACCUMULATOR_BITS
            return self.override_bits
        return source.bits


# ------------------------------------------------------------------ parameters

@dataclass(frozen=True, slots=True)
class _Charge:
    """The parameters charged to one layer."""

    names: tuple[str, ...]  # stored tensors it reads
    count: int
    nbytes: int
    new_bytes: int  # bytes no earlier layer read


_NOTHING = _Charge((), 0, 0, 0)


class _ParamLedger:
    """Charges stored parameters to the layers that read them, in layer order.

    A layer is charged what it reads of each stored tensor (a slice is charged its
    slice), never more than the tensor holds; the model totals count each stored
    tensor once; ``new_bytes`` is the part of a layer's charge no earlier layer
    read, so a parameter read by several layers is fetched once when it stays
    resident.
    """

    def __init__(self, override_bits: int | None) -> None:
        self.override_bits = override_bits
        self.stored: dict[str, tuple[StoredTensor, int]] = {}  # name -> (tensor, bits counted)
        self.charged_bytes: dict[str, int] = {}
        self.readers: dict[str, int] = {}

    def charge(self, reads: list[tuple[ParamSource, int]]) -> _Charge:
        """Charge one layer for ``reads``: (source, bits per element) pairs."""
        if not reads:
            return _NOTHING
        elements: dict[str, int] = {}
        bits_of: dict[str, int] = {}
        for source, bits in reads:
            for tensor, share in _shares(source):
                self.stored.setdefault(tensor.name, (tensor, bits))
                bits_of.setdefault(tensor.name, bits)
                cap = tensor.numel if tensor.numel is not None else share
                elements[tensor.name] = min(cap, elements.get(tensor.name, 0) + share)
        nbytes = new_bytes = 0
        for name, count in elements.items():
            share_bytes = (count * bits_of[name] + 7) // 8
            nbytes += share_bytes
            left = self._stored_bytes(name) - self.charged_bytes.get(name, 0)
            fresh = max(0, min(share_bytes, left))
            self.charged_bytes[name] = self.charged_bytes.get(name, 0) + fresh
            self.readers[name] = self.readers.get(name, 0) + 1
            new_bytes += fresh
        return _Charge(tuple(elements), sum(elements.values()), nbytes, new_bytes)

    def _stored_bytes(self, name: str) -> int:
        tensor, bits = self.stored[name]
        return ((tensor.numel or 0) * bits + 7) // 8

    def total_count(self) -> int:
        return sum(tensor.numel or 0 for tensor, _ in self.stored.values())

    def total_bytes(self) -> int:
        return sum(self._stored_bytes(name) for name in self.stored)

    def shared_bytes(self) -> int:
        return sum(self._stored_bytes(name) for name, count in self.readers.items() if count > 1)


def _shares(source: ParamSource) -> list[tuple[StoredTensor, int]]:
    """Elements read from each stored tensor behind ``source`` (split in proportion to size)."""
    read = source.read_elements()
    if len(source.stored) == 1:
        return [(source.stored[0], read)]
    total = sum(t.numel or 0 for t in source.stored)
    return [(t, (read * (t.numel or 0)) // total if total else 0) for t in source.stored]


# ------------------------------------------------------------------ one layer

def _ensure_ops_registered() -> None:
    import gate.ops  # noqa: F401  (importing registers every cost function)


_Param = tuple[TensorInfo | None, ParamSource, bool]  # tensor, how stored, is a bias


def _layer_params(node: Node) -> dict[str, _Param]:
    """Parameters the layer reads: its own, plus those read inside the subgraphs it runs."""
    params: dict[str, _Param] = {}
    if not node.param_inputs and not node.subgraphs:
        return params
    stack = [node]
    while stack:
        current = stack.pop()
        if current.folded or current.qdq_absorbed:
            continue
        for position in sorted(current.param_inputs):
            tensor = current.input(position)
            source = current.param_source(position)
            if source is not None:  # a packed weight counts the logical weights it holds
                source = logical_source(current, position, source)
            if tensor is not None and source is not None:
                params.setdefault(tensor.name, (tensor, source, is_bias(current, position)))
        for name in counted_subgraphs(current):
            stack.extend(reversed(current.subgraphs[name].nodes))
    return params


def _shape_problem(node: Node, unbound: dict[str, int]) -> str:
    """Why the layer's tensors cannot be sized, or "" when all are static; symbolic dims
    that keep it unmodelled are counted in ``unbound``. Asked only for a layer
    ``_operands`` found a tensor it cannot size (the common case costs nothing here)."""
    tensors = [t for t in node.inputs if t is not None] + [
        t for i, t in enumerate(node.outputs) if t.name and i not in node.unused_outputs]
    symbolic: list[str] = []
    other = ""
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


def _work(node: Node, unbound: dict[str, int], sized: bool) -> tuple[OpWork | None, str]:
    """The layer's work, or None and why not. ``sized``: every present input and used
    output has a static shape and a fixed-size element type (``_operands`` checked)."""
    func = cost_function_for(node.domain, node.op_type)
    if func is None:
        where = f" (domain '{node.domain}')" if node.domain else ""
        return None, f"no cost model for op type {node.op_type}{where}"
    if not sized:
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


_Share = Callable[[Any], Any]


def _sharer() -> _Share:
    """``shared(value)``: the equal value seen before, else ``value`` (remembered).

    Why: a large graph repeats a few shape and dtype tuples and a few works, and a
    copy of each per layer was about a third of the profile's memory. Only
    immutable values are shared.
    """
    seen: dict[Any, Any] = {}

    def shared(value: Any) -> Any:
        try:
            return seen.setdefault(value, value)
        except TypeError:  # an unhashable part (a list for a shape in a hand-built graph)
            return value
    return shared


def _profile_layer(node: Node, counting: _Counting, ledger: _ParamLedger,
                   unbound: dict[str, int], shared: _Share) -> LayerProfile:
    if node.folded or node.qdq_absorbed:
        return _offline_layer(node, counting)
    params = _layer_params(node)
    charge = ledger.charge([(source, counting.param_bits(tensor, source, bias))
                            for tensor, source, bias in params.values()]) if params else _NOTHING
    input_shapes, input_dtypes, input_bytes, inputs_sized, _ = _inputs(node, params, counting)
    output_shapes, output_dtypes, output_bytes, outputs_sized, outputs = _outputs(node, counting)
    work, reason = _work(node, unbound, inputs_sized and outputs_sized)
    if work is not None and (input_bytes is None or output_bytes is None):
        work, reason = None, "a tensor's size is unknown (element type without a fixed size)"
    precision = counting.override or layer_precision(node, counting.deployed)
    if work is not None and _requantizes(node, work, precision, outputs, counting):
        work = requantized(work)
    if work is not None:
        work = shared(work)
    return LayerProfile(
        index=node.index,
        name=node.name,
        op_type=node.op_type,
        domain=node.domain,
        input_shapes=shared(input_shapes),
        input_dtypes=shared(input_dtypes),
        output_shapes=shared(output_shapes),
        output_dtypes=shared(output_dtypes),
        param_names=charge.names,
        param_count=charge.count,
        param_bytes=charge.nbytes,
        input_bytes=input_bytes,
        output_bytes=output_bytes,
        macs=work.macs if work else None,
        flops=work.flops if work else None,
        modelled=work is not None,
        unmodelled_reason=reason,
        work=work,
        precision=precision,
        param_new_bytes=charge.new_bytes,
    )


# One side of a layer (its inputs or its outputs), read in one pass: every position's shape
# and dtype, the bytes of the activations counted (None: a size unknown), whether every
# present tensor has a static shape and a fixed-size element type, and (outputs only) the
# tensors counted. A plain tuple: built twice per layer, a record class costs more.
_Side = tuple[tuple[Shape | None, ...], tuple[str, ...], int | None, bool, tuple[TensorInfo, ...]]


def _activation_bytes(tensor: TensorInfo, count: int | None, counting: _Counting) -> int | None:
    """Storage bytes of an activation as counted, None when unknown; ``count`` is its
    element count (read once by the caller, who needs it too)."""
    if count is None:
        return None
    bits = counting.tensor_bits(tensor)
    return None if bits == 0 else (count * bits + 7) // 8


def _inputs(node: Node, params: dict[str, _Param], counting: _Counting) -> _Side:
    """Shapes, dtypes and sizedness of every input; bytes of the activation inputs
    (parameters and metadata left out, a tensor read twice counted once)."""
    sources, param_inputs = node.param_sources, node.param_inputs
    shapes: list[Shape | None] = []
    dtypes: list[str] = []
    counted: set[str] = set()
    nbytes: int | None = 0
    sized = True
    for i, tensor in enumerate(node.inputs):
        if tensor is None:
            shapes.append(None)
            dtypes.append("")
            continue
        shapes.append(tensor.shape)
        dtypes.append(tensor.dtype)
        count = tensor.numel  # cached per distinct shape
        if sized:
            sized = count is not None and DTYPE_BITS.get(tensor.dtype, 0) > 0
        name = tensor.name
        if (i in sources or i in param_inputs or name in params or name in counted
                or nbytes is None):
            continue
        counted.add(name)
        size = _activation_bytes(tensor, count, counting)
        nbytes = None if size is None else nbytes + size
    return tuple(shapes), tuple(dtypes), nbytes, sized, ()


def _outputs(node: Node, counting: _Counting) -> _Side:
    """Shapes and dtypes of every output; bytes and sizedness of the used ones (an output
    nothing reads, or an omitted one, is not written)."""
    unused = node.unused_outputs
    shapes: list[Shape | None] = []
    dtypes: list[str] = []
    used: list[TensorInfo] = []
    nbytes: int | None = 0
    sized = True
    for i, tensor in enumerate(node.outputs):
        shapes.append(tensor.shape)
        dtypes.append(tensor.dtype)
        if not tensor.name or i in unused:
            continue
        used.append(tensor)
        count = tensor.numel
        if sized:
            sized = count is not None and DTYPE_BITS.get(tensor.dtype, 0) > 0
        if nbytes is not None:
            size = _activation_bytes(tensor, count, counting)
            nbytes = None if size is None else nbytes + size
    return tuple(shapes), tuple(dtypes), nbytes, sized, tuple(used)


def _requantizes(node: Node, work: OpWork, precision: str, outputs: tuple[TensorInfo, ...],
                 counting: _Counting) -> bool:
    """A float matrix op running at an integer precision that writes integer outputs
    (its output read by a fused QuantizeLinear, or an integer --precision) requantizes
    them, as a QOperator op does."""
    if precision not in INTEGER_PRECISIONS or not work.gemms or node.op_type in QOPERATOR_OPS:
        return False
    return any(t.dtype in FLOAT_DTYPES and counting.tensor_bits(t) < DTYPE_BITS[t.dtype]
               for t in outputs)


def _offline_layer(node: Node, counting: _Counting) -> LayerProfile:
    """A folded node or a fused quantize/dequantize: no work, no bytes, no parameters."""
    role, note = ("folded", FOLDED_NOTE) if node.folded else (QDQ_ABSORBED, QDQ_ABSORBED_NOTE)
    return LayerProfile(
        index=node.index, name=node.name, op_type=node.op_type, domain=node.domain,
        input_shapes=tuple(None if t is None else t.shape for t in node.inputs),
        input_dtypes=tuple("" if t is None else t.dtype for t in node.inputs),
        output_shapes=tuple(t.shape for t in node.outputs),
        output_dtypes=tuple(t.dtype for t in node.outputs),
        param_names=(), param_count=0, param_bytes=0, input_bytes=0, output_bytes=0,
        macs=0, flops=0, modelled=True, unmodelled_reason="",
        work=OpWork(is_view=True, note=note),
        precision=counting.override or layer_precision(node, counting.deployed), role=role)


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
        work_unmodelled += unmodelled_work_bound(layer)
        unsized += not _sizes_known(layer)
    unmodelled = tuple(UnmodelledOp(op, domain, count, reason) for (op, domain, reason), count
                       in sorted(groups.items(), key=lambda item: (-item[1], item[0])))
    modelled = [layer for layer in layers if layer.modelled]
    return Coverage(
        nodes_total=len(layers),
        nodes_modelled=len(modelled),
        work_modelled=sum(layer.counted_macs for layer in modelled),
        work_unmodelled_estimate=work_unmodelled,
        unmodelled=unmodelled,
        unsized_unmodelled_nodes=unsized,
    )


def unmodelled_work_bound(layer: LayerProfile) -> int:
    """An upper bound of the MACs of a layer roofgate cannot count: input elements times
    output elements, at least 1.

    Why this bound: an op without internal loops computes each output element from
    at most all of its input elements, with at most one multiply-accumulate per
    input element, so it does at most (input elements) x (output elements) MACs.
    That covers contractions (MatMul [M,K]x[K,N]: (MK + KN) x MN >= MKN MACs) and
    attention (its work grows with sequence length squared, like the bound), where
    the output size alone understated the work by orders of magnitude. It
    overstates elementwise ops on purpose: unknown work is counted pessimistically
    (fail closed); model the op to get its real share. Ops with subgraphs (Loop,
    Scan, If) have their own cost functions. Parameters count as inputs.
    """
    inputs = sum(_numel(shape) for shape, dtype in zip(layer.input_shapes, layer.input_dtypes)
                 if dtype)
    outputs = sum(_numel(shape) for shape in layer.output_shapes)
    return max(1, inputs) * max(1, outputs)


def _sizes_known(layer: LayerProfile) -> bool:
    """Whether every present input and every output of ``layer`` has a known size."""
    present = [s for s, dtype in zip(layer.input_shapes, layer.input_dtypes) if dtype]
    return all(_is_sized(shape) for shape in (*present, *layer.output_shapes))


def _is_sized(shape: Shape | None) -> bool:
    return shape is not None and all(isinstance(d, int) and d >= 0 for d in shape)


def _numel(shape: Shape | None) -> int:
    if shape is None or any(isinstance(d, str) for d in shape):
        return 0
    return prod(shape)  # type: ignore[arg-type]


def _notes(model: LoadedModel, precision: str | None, override_bits: int | None,
           unbound: dict[str, int], layers: tuple[LayerProfile, ...]) -> tuple[str, ...]:
    notes = [f"symbolic dim '{dim}' unbound: bind it with --dim {dim}=N ({count} layers "
             f"unmodelled{_typo_hint(dim, model.unused_bindings)})"
             for dim, count in sorted(unbound.items())]
    if override_bits is not None:
        notes.append(f"floating-point tensors counted at {_precision_label(precision)} "
                     f"({override_bits} bits) as deployed; MACs unchanged")
    else:
        notes.append(_deployed_note(layers))
    for role, what in (("folded", "folded offline from constants"),
                       (QDQ_ABSORBED, "activation quantize/dequantize nodes absorbed")):
        count = sum(1 for layer in layers if layer.role == role)
        if count:
            notes.append(f"{count} node(s) {what}: they cost nothing and are not layers of "
                         f"the deployed model")
    notes.extend(model.warnings)
    return tuple(notes)


def _typo_hint(dim: str, unused_bindings: tuple[str, ...]) -> str:
    """'; the binding 'seqlen' names no dim of this model: a typo?' when one is near ``dim``."""
    near = near_name(dim, unused_bindings)
    return f"; the binding '{near}' names no dim of this model: a typo for '{dim}'?" \
        if near else ""


def _deployed_note(layers: tuple[LayerProfile, ...]) -> str:
    """Which precisions the layers run at, read from the graph (weighted by layer count)."""
    counts: dict[str, int] = {}
    for layer in layers:
        if layer.role == "layer" and layer.precision and layer.counted_macs > 0:
            counts[layer.precision] = counts.get(layer.precision, 0) + 1
    if not counts:
        return f"precision {DEPLOYED_LABEL}: read from the graph (no layer with MACs)"
    parts = ", ".join(f"{name} on {count} layer(s) with MACs"
                      for name, count in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))
    return (f"precision {DEPLOYED_LABEL} (read from the graph: QDQ and QOperator structure, "
            f"tensor types): {parts}; --precision overrides it")
