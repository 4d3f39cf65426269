"""The topological order gathered during the converter's walk (``OrderScan``) against the
order computed by its own walk (``topological_order``): same order, same errors.

Random small graphs cover the cases both must agree on: in order, unordered, a node
reading its own output, a cycle, a dangling read, a tensor produced twice.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import GraphProto, helper

from gate.errors import InputError
from gate.model.order import OrderScan, topological_order

_NAMES = ["x", "w", "a", "b", "c", "d", ""]  # x and w are defined outside the nodes
_KNOWN = {"x", "w"}.__contains__


def _graph(nodes: list[tuple[list[str], list[str]]]) -> GraphProto:
    made = [helper.make_node("Add", inputs, outputs, name=f"n{i}" if i % 2 else "")
            for i, (inputs, outputs) in enumerate(nodes)]
    return helper.make_graph(made, "g", [], [])


def _outcome(run: object) -> tuple[str, object]:
    try:
        return "order", run()  # type: ignore[operator]
    except InputError as exc:
        return "error", str(exc)


def _scanned(graph: GraphProto) -> list[int]:
    scan = OrderScan(graph, "m.onnx")
    for index, node in enumerate(graph.node):  # the converter's walk, in file order
        scan.read(index, list(node.input))
        scan.produce(index, list(node.output))
    return scan.order(_KNOWN)


_NODES = st.lists(st.tuples(st.lists(st.sampled_from(_NAMES), max_size=3),
                            st.lists(st.sampled_from(_NAMES[2:]), min_size=1, max_size=2)),
                  max_size=6)


@settings(max_examples=300, deadline=None)
@given(_NODES)
def test_order_scan_agrees_with_topological_order(nodes: list[tuple[list[str], list[str]]]) -> None:
    graph = _graph(nodes)
    assert _outcome(lambda: _scanned(graph)) == \
        _outcome(lambda: topological_order(graph, _KNOWN, "m.onnx"))


@pytest.mark.parametrize(("nodes", "expected"), [
    ([(["x"], ["a"]), (["a"], ["b"])], ("order", [0, 1])),
    ([(["a"], ["b"]), (["x"], ["a"])], ("order", [1, 0])),  # unordered: sorted
    ([(["x", "ghost"], ["a"])], ("error", "reads tensor 'ghost'")),
    ([(["x"], ["a"]), (["x"], ["a"])], ("error", "produced by both")),
    ([(["b"], ["a"]), (["a"], ["b"])], ("error", "has a cycle")),
])
def test_order_scan_cases(nodes: list[tuple[list[str], list[str]]],
                          expected: tuple[str, object]) -> None:
    kind, value = _outcome(lambda: _scanned(_graph(nodes)))
    assert kind == expected[0]
    assert value == expected[1] if kind == "order" else str(expected[1]) in str(value)
