"""Repairing names that are not UTF-8 (gate/model/text.py): the one-pass check sees every field
the repair fixes, and a clean model is not walked again."""

from __future__ import annotations

import onnx
import pytest
from loadkit import vi
from onnx import helper

from gate.model import text
from gate.model.text import repair_text_fields

# Every text field the repair covers, each holding its own marker (4 ASCII bytes).
MARKERS = ["PRDN", "PRDV", "OPSD", "GRPN", "NODN", "NODD", "NODI", "NODO", "GINP", "GOUT",
           "GVIN", "GINI", "SUBG", "SUBN", "SUBI", "SUBO", "FUNN", "FUND", "FUNI", "FUNO",
           "FNDN", "FNDI", "FNDO"]


def _marked_model() -> onnx.ModelProto:
    branch = helper.make_graph([helper.make_node("Identity", ["NODO"], ["SUBO"], name="SUBN")],
                               "SUBG", [], [vi("SUBO", [1])])
    other = helper.make_graph([helper.make_node("Identity", ["SUBI"], ["o2"])], "else",
                              [], [vi("o2", [1])])
    function = helper.make_function("FUND", "FUNN", ["FUNI"], ["FUNO"], [
        helper.make_node("Identity", ["FUNI"], ["FNDO"], name="FNDN"),
        helper.make_node("Identity", ["FNDI"], ["FUNO"])],
        [helper.make_opsetid("", 17)])
    nodes = [helper.make_node("Relu", ["GINP"], ["NODO"], name="NODN"),
             helper.make_node("FUNN", ["NODI"], ["GOUT"], domain="NODD"),
             helper.make_node("If", ["cond"], ["r"], then_branch=branch, else_branch=other)]
    inputs = [vi("GINP", [1]), vi("cond", [], onnx.TensorProto.BOOL)]
    graph = helper.make_graph(nodes, "GRPN", inputs,
                              [vi("GOUT", [1])], [helper.make_tensor("GINI", 1, [1], [0.0])],
                              value_info=[vi("GVIN", [1])])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                    helper.make_opsetid("OPSD", 1)],
                             functions=[function], producer_name="PRDN", producer_version="PRDV")


def _with_invalid(marker: str) -> onnx.ModelProto:
    raw = _marked_model().SerializeToString()
    assert marker.encode() in raw
    return onnx.load_from_string(raw.replace(marker.encode(), b"\xff" + marker[1:].encode()))


@pytest.mark.parametrize("marker", MARKERS)
def test_a_non_utf8_byte_in_any_repaired_field_is_seen_and_repaired(marker: str) -> None:
    proto = _with_invalid(marker)
    assert not text._all_text(proto)
    assert repair_text_fields(proto) >= 1
    assert text._all_text(proto)
    assert "\\xff" + marker[1:] in str(proto)  # the visible escape, as the loader tests expect


def test_a_clean_model_is_checked_in_one_pass_and_never_walked_for_repair(
        monkeypatch: pytest.MonkeyPatch) -> None:
    def refuse(*_: object) -> None:
        raise AssertionError("walked for repair although every field is text")

    monkeypatch.setattr(text, "_text_fields", refuse)
    monkeypatch.setattr(text, "_repeated_text_fields", refuse)
    assert repair_text_fields(_marked_model()) == 0
