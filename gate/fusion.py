"""Group layers into the fused layers a target's compiler would run (its ``fusion:`` section).

Edge compilers fold per-channel scales (BatchNormalization, a constant Mul/Add)
into the preceding conv or matmul's weights and run activations, clips, residual
adds and requantization as the epilogue of the producing layer, so those ops
never make their own round trip through memory. ``plan_fusion`` finds those
groups in a profiled model, as the target declares them; ``gate.costmodel``
then costs each group as one layer. Target-aware, but it only decides *which*
layers form a group: MACs, parameters and every per-layer figure of the profile
stay as they are.

A group is a chain: a producer (a layer with GEMMs), then fold ops (constant
operands only, before any nonlinearity), then up to ``max_epilogue_ops``
elementwise epilogue ops; optionally a constant Pad in front of a conv. Every
intermediate tensor must have exactly one consumer and not be a graph output
(otherwise it has to be written out anyway), and each op must keep the element
count (no broadcast to a larger tensor). A chain runs through view layers and
layers the profile already costs as nothing (a quantize/dequantize pair absorbed by
its producer, as QDQ exports put around every conv); they join the group only when
a fold or epilogue op follows them.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

from gate.model.graph import Graph, Node
from gate.profile import LayerProfile, ModelProfile
from gate.targets.spec import FusionSpec

_PAD_CONSUMERS = ("Conv", "ConvInteger", "QLinearConv")
_COMMUTATIVE = ("Add", "Mul")  # the chain tensor may be either operand


@dataclass(frozen=True, slots=True)
class FusedGroup:
    """One fused layer: a producer and the layers it absorbs."""

    head: int  # index of the producer layer (the group is named after it)
    members: tuple[int, ...]  # the absorbed layers in chain order (a Pad first)
    folded: tuple[int, ...]  # members folded into the producer's weights (no work left)
    epilogue_ops: int  # element operations the epilogue members do
    input_bytes: int  # activations the group reads from outside itself
    output_bytes: int  # its final output: the one tensor it writes


@dataclass(frozen=True, slots=True)
class FusionPlan:
    """Every fused group of a model, indexed by head and by member."""

    groups: tuple[FusedGroup, ...] = ()
    group_of_head: Mapping[int, FusedGroup] = field(default_factory=lambda: MappingProxyType({}))
    head_of_member: Mapping[int, int] = field(default_factory=lambda: MappingProxyType({}))

    @property
    def fused_layers(self) -> int:
        return len(self.head_of_member)


NO_FUSION = FusionPlan()


def plan_fusion(profile: ModelProfile, spec: FusionSpec,
                engine_of: Callable[[LayerProfile], str]) -> FusionPlan:
    """The fused groups of ``profile`` under ``spec``.

    ``engine_of`` says where the target runs a layer alone; a producer on the host
    heads no group and a layer the target runs on the host joins none.
    """
    nodes = profile.model.graph.nodes
    if len(nodes) != len(profile.layers) or any(
            layer.index != i for i, layer in enumerate(profile.layers)):
        return NO_FUSION  # a hand-built profile without its graph: nothing to walk
    wiring = _Wiring.of(profile.model.graph)
    engine_of = _remembered(engine_of)
    taken: set[int] = set()
    groups = []
    for layer in profile.layers:
        if layer.index in taken or not _can_head(layer, spec, engine_of):
            continue
        group = _grow(layer, profile, wiring, spec, engine_of, taken)
        if group is not None:
            groups.append(group)
            taken.update(group.members)
            taken.add(group.head)
    return FusionPlan(
        groups=tuple(groups),
        group_of_head=MappingProxyType({g.head: g for g in groups}),
        head_of_member=MappingProxyType({m: g.head for g in groups for m in g.members}),
    )


def _remembered(engine_of: Callable[[LayerProfile], str]) -> Callable[[LayerProfile], str]:
    """``engine_of`` asked once per layer (a layer is asked as a head and as a member)."""
    engines: dict[int, str] = {}

    def remembered(layer: LayerProfile) -> str:
        engine = engines.get(layer.index)
        if engine is None:
            engine = engines[layer.index] = engine_of(layer)
        return engine
    return remembered


# ------------------------------------------------------------------ the graph's wiring

@dataclass(frozen=True, slots=True)
class _Wiring:
    """Who produces and who consumes each tensor; which tensors leave the graph."""

    consumers: Mapping[str, Sequence[int]]  # built here, never changed
    producer: Mapping[str, int]
    graph_outputs: frozenset[str]
    constants: frozenset[int]  # positions of Constant nodes (their outputs are constant operands)

    @staticmethod
    def of(graph: Graph) -> _Wiring:
        consumers: dict[str, list[int]] = {}
        producer: dict[str, int] = {}
        constants: list[int] = []
        for position, node in enumerate(graph.nodes):  # one pass over a large graph
            names = list(_names_read(node)) if node.subgraphs else [  # most: inputs only
                t.name for t in node.inputs if t is not None and t.name]
            for name in dict.fromkeys(names) if len(names) > 1 else names:  # each reader once
                readers = consumers.get(name)
                if readers is None:
                    consumers[name] = [position]
                else:
                    readers.append(position)
            for tensor in node.outputs:
                if tensor.name:
                    producer[tensor.name] = position
            if node.op_type == "Constant" and not node.domain:
                constants.append(position)
        return _Wiring(consumers, producer, frozenset(t.name for t in graph.outputs),
                       frozenset(constants))

    def sole_consumer(self, tensor: str) -> int | None:
        """The one layer reading ``tensor``, or None (several, none, or a graph output)."""
        readers = self.consumers.get(tensor, ())
        if len(readers) != 1 or tensor in self.graph_outputs:
            return None
        return readers[0]


def _names_read(node: Node) -> Iterator[str]:
    """Tensor names a node reads, including those its subgraphs read from outside."""
    for tensor in node.inputs:
        if tensor is not None and tensor.name:
            yield tensor.name
    for graph in node.subgraphs.values():
        for inner in graph.nodes:
            yield from _names_read(inner)


# ------------------------------------------------------------------ growing one group

def _can_head(layer: LayerProfile, spec: FusionSpec,
              engine_of: Callable[[LayerProfile], str]) -> bool:
    work = layer.work
    if work is None or not any(g.macs > 0 for g in work.gemms):
        return False
    name = f"{layer.domain}:{layer.op_type}" if layer.domain else layer.op_type
    return name in spec.producers and engine_of(layer) != "host"


def _single_output(node: Node) -> str | None:
    outputs = node.outputs
    if len(outputs) == 1:  # the common case, without a list
        return outputs[0].name or None
    named = [t.name for t in outputs if t.name]
    return named[0] if len(named) == 1 else None


@dataclass
class _Chain:
    """A group under construction."""

    members: list[int] = field(default_factory=list)
    folded: list[int] = field(default_factory=list)
    epilogue: list[int] = field(default_factory=list)
    epilogue_ops: int = 0
    extra_input_bytes: int = 0


def _grow(head: LayerProfile, profile: ModelProfile, wiring: _Wiring, spec: FusionSpec,
          engine_of: Callable[[LayerProfile], str], taken: set[int]) -> FusedGroup | None:
    nodes, layers = profile.model.graph.nodes, profile.layers
    chain = _Chain()
    pad = _pad_prologue(head, profile, wiring, spec, engine_of, taken)
    if pad is not None:
        chain.members.append(pad)
    last, previous = head, nodes[head.index]  # the last layer with work; the last node
    passed: list[int] = []  # free layers (views, absorbed Q/DQ) waiting for a member after them
    tensor = _single_output(previous)
    while tensor is not None:
        position = wiring.sole_consumer(tensor)
        if position is None or position in taken:
            break
        candidate, node = layers[position], nodes[position]
        output = _single_output(node)
        role = None if output is None else _role(candidate, node, tensor, previous, chain,
                                                  spec, wiring, engine_of)
        if role is None:
            break
        previous, tensor = node, output
        if role == "pass":
            passed.append(position)
            continue
        chain.members.extend(passed)
        passed.clear()
        chain.members.append(position)
        if role == "fold":
            chain.folded.append(position)
        else:
            chain.epilogue.append(position)
            chain.epilogue_ops += _element_ops(candidate)
            chain.extra_input_bytes += max(0, candidate.sized[0] - last.sized[1])
        last = candidate
    if not chain.members:
        return None
    return _finish(head, pad, last, chain, layers)


def _finish(head: LayerProfile, pad: int | None, last: LayerProfile, chain: _Chain,
            layers: tuple[LayerProfile, ...]) -> FusedGroup:
    inputs = head.sized[0]
    if pad is not None:  # the conv reads the unpadded tensor straight from the Pad's input
        inputs += layers[pad].sized[0] - layers[pad].sized[1]
    return FusedGroup(
        head=head.index, members=tuple(chain.members), folded=tuple(chain.folded),
        epilogue_ops=chain.epilogue_ops, input_bytes=max(0, inputs) + chain.extra_input_bytes,
        output_bytes=last.sized[1])


def _role(layer: LayerProfile, node: Node, tensor: str, previous: Node, chain: _Chain,
          spec: FusionSpec, wiring: _Wiring, engine_of: Callable[[LayerProfile], str]
          ) -> str | None:
    """"fold", "epilogue", "pass" (a free layer the chain runs through) or None (it stops);
    ``node`` has a single output (the caller checked)."""
    if (layer.work is None or layer.work.gemms
            or engine_of(layer) == "host" or not _keeps_size(node, previous)):
        return None
    if layer.work.is_view:  # a view, or a layer the profile already costs as nothing
        return "pass"
    positions = [i for i, t in enumerate(node.inputs) if t is not None and t.name == tensor]
    if not positions:
        return None
    first = positions[0] == 0 or layer.op_type in _COMMUTATIVE
    name = f"{layer.domain}:{layer.op_type}" if layer.domain else layer.op_type
    if (name in spec.fold and not chain.epilogue and first
            and _others_constant(node, positions[0], wiring)):
        return "fold"
    if name in spec.epilogue and first and len(chain.epilogue) < spec.max_epilogue_ops:
        return "epilogue"
    return None


def _keeps_size(node: Node, previous: Node) -> bool:
    """Elementwise on the chain tensor: the output has as many (known) elements as it."""
    count = node.outputs[0].numel
    return count is not None and count > 0 and count == previous.outputs[0].numel


def _others_constant(node: Node, chain_position: int, wiring: _Wiring) -> bool:
    """Every operand but the chain tensor is a parameter or a Constant's output."""
    for position, tensor in enumerate(node.inputs):
        if tensor is None or position == chain_position or position in node.param_inputs:
            continue
        source = wiring.producer.get(tensor.name)
        if source is None or source not in wiring.constants:
            return False
    return True


def _element_ops(layer: LayerProfile) -> int:
    work = layer.work
    if work is None:
        return 0
    return work.vector_ops or work.flops


def _pad_prologue(head: LayerProfile, profile: ModelProfile, wiring: _Wiring, spec: FusionSpec,
                  engine_of: Callable[[LayerProfile], str], taken: set[int]) -> int | None:
    """The Pad feeding ``head`` that the conv can absorb as its own padding, if any."""
    if not spec.pad_into_conv or head.op_type not in _PAD_CONSUMERS or head.domain:
        return None
    data = profile.model.graph.nodes[head.index].inputs[:1]
    if not data or data[0] is None:
        return None
    source = wiring.producer.get(data[0].name)
    if source is None or source in taken or wiring.sole_consumer(data[0].name) != head.index:
        return None
    pad_node, pad_layer = profile.model.graph.nodes[source], profile.layers[source]
    mode = pad_node.attr("mode", "constant")
    mode = mode.decode() if isinstance(mode, bytes) else str(mode)
    if (pad_node.op_type != "Pad" or pad_node.domain or mode != "constant"
            or pad_layer.work is None or engine_of(pad_layer) == "host"):
        return None
    return source
