"""Structural checks of the pre-inference guard (gate/model/guards.py): how often it asks onnx."""

from __future__ import annotations

import onnx
import pytest
from loadkit import model, vi
from onnx import helper

from gate.model import guards
from gate.model.guards import MAX_SHAPE_DATA_ELEMENTS, huge_shape_data


def _add_chain(nodes: int, length: int) -> onnx.ModelProto:
    """``nodes`` Adds in a row over a declared 1-D input of ``length`` elements."""
    chain = [helper.make_node("Add", [f"t{i}", f"t{i}"], [f"t{i + 1}"], name=f"add{i}")
             for i in range(nodes)]
    return model(chain, [vi("t0", [length])], [vi(f"t{nodes}", [length])])


@pytest.fixture
def schema_lookups(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The op types the guard asks onnx for (the per-op cache emptied first)."""
    asked: list[str] = []
    real = onnx.defs.get_schema

    def counting(op_type: str, *args: object) -> onnx.defs.OpSchema:
        asked.append(op_type)
        return real(op_type, *args)

    guards._schema_propagates.cache_clear()
    monkeypatch.setattr(onnx.defs, "get_schema", counting)
    yield asked
    guards._schema_propagates.cache_clear()


def test_a_graph_without_an_oversized_tensor_asks_onnx_for_no_schema(
        schema_lookups: list[str]) -> None:
    assert huge_shape_data(_add_chain(50, 8)) is None
    assert schema_lookups == []


def test_an_oversized_declared_tensor_asks_once_per_op_type(schema_lookups: list[str]) -> None:
    # the last Add reads an input declared one above the limit; the 49 before it read 8
    proto = _add_chain(50, 8)
    proto.graph.value_info.append(vi("t49", [MAX_SHAPE_DATA_ELEMENTS + 1]))
    found = huge_shape_data(proto)
    assert found is not None and found.reads and found.node == "'add49'"
    assert found.elements == MAX_SHAPE_DATA_ELEMENTS + 1
    assert schema_lookups == ["Add"]


def test_the_cached_answer_is_onnx_s_own(schema_lookups: list[str]) -> None:
    # onnx 1.23 gives Add a data-propagation function and Relu none (asked here, not assumed)
    for op_type in ("Add", "Relu", "Cast"):
        expected = onnx.defs.get_schema(op_type, 17, "").has_data_propagation_function
        assert guards._schema_propagates(op_type, 17) is bool(expected)
    assert guards._schema_propagates("NoSuchOp", 17) is False
