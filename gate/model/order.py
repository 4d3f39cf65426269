"""Topological order of a graph's nodes, refusing dangling and cyclic edges (linear time)."""

from __future__ import annotations

from collections import deque
from collections.abc import Callable

import onnx

from gate.errors import InputError

_REMEDY = "re-export the model or repair the graph (onnx.checker shows the details)"


def _label(node: onnx.NodeProto, index: int) -> str:
    return f"node '{node.name}' ({node.op_type})" if node.name else f"node #{index} ({node.op_type})"


def _producers(proto: onnx.GraphProto, path: str) -> dict[str, int]:
    producer: dict[str, int] = {}
    for index, node in enumerate(proto.node):
        for name in node.output:
            if not name:
                continue
            first = producer.setdefault(name, index)
            if first != index:
                raise InputError(f"tensor '{name}' is produced by both "
                                 f"{_label(proto.node[first], first)} and "
                                 f"{_label(node, index)}; {_REMEDY}", path)
    return producer


class OrderScan:
    """What ``topological_order`` needs, gathered while another walk reads the nodes.

    Why: each read of a node's inputs or outputs from protobuf builds new strings; the
    converter's one walk feeds this instead of a second walk here. For every node in
    file order call ``read`` (its inputs), then ``produce`` (its outputs); ``order``
    then decides exactly as ``topological_order`` does, with the same errors.
    """

    def __init__(self, proto: onnx.GraphProto, path: str) -> None:
        self.proto = proto
        self.path = path
        self.producer: dict[str, int] = {}
        self.not_yet: list[tuple[int, str]] = []  # (reader, name) no earlier node produced

    def read(self, index: int, names: list[str]) -> None:
        producer = self.producer
        for name in names:
            if name and name not in producer:
                self.not_yet.append((index, name))

    def produce(self, index: int, names: list[str]) -> None:
        """Refuses a tensor two nodes produce (as ``_producers``, at the same first clash)."""
        for name in names:
            if not name:
                continue
            first = self.producer.setdefault(name, index)
            if first != index:
                raise InputError(f"tensor '{name}' is produced by both "
                                 f"{_label(self.proto.node[first], first)} and "
                                 f"{_label(self.proto.node[index], index)}; {_REMEDY}", self.path)

    def order(self, known: Callable[[str], bool]) -> list[int]:
        """``topological_order``'s result: the first dangling read (in node and input
        order) is refused; a read of a later node's output sorts the graph."""
        in_order = True
        for index, name in self.not_yet:
            source = self.producer.get(name)
            if source is None:
                if not known(name):
                    raise InputError(f"{_label(self.proto.node[index], index)} reads tensor "
                                     f"'{name}' that no node, graph input or initializer "
                                     f"defines; {_REMEDY}", self.path)
            elif source >= index:
                in_order = False
        if in_order:
            return list(range(len(self.proto.node)))
        return _kahn(self.proto, self.producer, self.path)


def topological_order(proto: onnx.GraphProto, known: Callable[[str], bool], path: str) -> list[int]:
    """Node indices in an order where every input is produced before it is used.

    ``known`` says whether a name is defined outside the nodes (graph input,
    initializer, outer scope). A name nobody defines raises ``InputError``
    naming the node (a dangling edge); so does a cycle. A graph already in order
    (the ONNX norm) is returned as is; an unordered acyclic one is sorted.
    """
    producer = _producers(proto, path)
    in_order = True
    for index, node in enumerate(proto.node):
        for name in node.input:
            if not name:
                continue
            source = producer.get(name)
            if source is None:
                if not known(name):
                    raise InputError(f"{_label(node, index)} reads tensor '{name}' that no node, "
                                     f"graph input or initializer defines; {_REMEDY}", path)
            elif source >= index:
                in_order = False
    if in_order:
        return list(range(len(proto.node)))
    return _kahn(proto, producer, path)


def _kahn(proto: onnx.GraphProto, producer: dict[str, int], path: str) -> list[int]:
    count = len(proto.node)
    indegree = [0] * count
    consumers: list[list[int]] = [[] for _ in range(count)]
    for index, node in enumerate(proto.node):
        for name in node.input:
            source = producer.get(name) if name else None
            if source is not None:
                indegree[index] += 1
                consumers[source].append(index)
    ready = deque(i for i in range(count) if indegree[i] == 0)
    order: list[int] = []
    while ready:
        index = ready.popleft()
        order.append(index)
        for consumer in consumers[index]:
            indegree[consumer] -= 1
            if indegree[consumer] == 0:
                ready.append(consumer)
    if len(order) < count:
        stuck = next(i for i in range(count) if indegree[i] > 0)
        raise InputError(f"the graph has a cycle through {_label(proto.node[stuck], stuck)}; "
                         f"{_REMEDY}", path)
    return order
