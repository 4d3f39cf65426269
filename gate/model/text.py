"""Repair text fields that are not valid UTF-8, so no name reaches a report as bytes.

ONNX's protobuf schema (proto2) lets string fields hold any bytes; protobuf's
Python runtime then hands them back as ``bytes``. A mutated or hand-edited file
can carry such a node or tensor name. Names are only labels (and links between
nodes, which stay consistent because every occurrence is decoded the same
way), so we decode them with visible ``\\xNN`` escapes instead of refusing the
model, and the loader says how many it repaired.
"""

from __future__ import annotations

from collections.abc import Iterator, MutableSequence

import onnx


def repair_text_fields(model: onnx.ModelProto) -> int:
    """Decode every bytes-valued name in ``model`` in place; returns how many were repaired."""
    if _all_text(model):
        return 0  # the usual case, found in one pass; the repair below walks twice
    repaired = 0
    for holder, field in _text_fields(model):
        value = getattr(holder, field)
        if isinstance(value, bytes):
            setattr(holder, field, _decode(value))
            repaired += 1
    for repeated in _repeated_text_fields(model):
        for i, value in enumerate(repeated):
            if isinstance(value, bytes):
                repeated[i] = _decode(value)
                repaired += 1
    return repaired


def _all_text(model: onnx.ModelProto) -> bool:
    """Whether every field ``repair_text_fields`` repairs already holds ``str``.

    One walk over the graphs (subgraphs found on the way) and functions; ``str.join``
    raises TypeError on the first ``bytes`` it meets (an f-string would not).
    """
    try:
        "".join((model.producer_name, model.producer_version,
                 *(opset.domain for opset in model.opset_import)))
        stack = [model.graph]
        while stack:
            graph = stack.pop()
            for node in graph.node:
                "".join((node.name, node.op_type, node.domain, *node.input, *node.output))
                for attribute in node.attribute:
                    if attribute.type == onnx.AttributeProto.GRAPH:
                        stack.append(attribute.g)
                    elif attribute.type == onnx.AttributeProto.GRAPHS:
                        stack.extend(attribute.graphs)
            "".join((graph.name, *(value.name for value in graph.input),
                     *(value.name for value in graph.output),
                     *(value.name for value in graph.value_info),
                     *(tensor.name for tensor in graph.initializer)))
        for function in model.functions:
            "".join((function.name, function.domain, *function.input, *function.output))
            for node in function.node:
                "".join((node.name, node.op_type, node.domain, *node.input, *node.output))
    except TypeError:
        return False
    return True


def _decode(value: bytes) -> str:
    return value.decode("utf-8", errors="backslashreplace")


def _graphs(graph: onnx.GraphProto) -> Iterator[onnx.GraphProto]:
    stack = [graph]
    while stack:  # iterative: nesting depth is bounded by protobuf, not by our stack
        current = stack.pop()
        yield current
        for node in current.node:
            for attribute in node.attribute:
                if attribute.type == onnx.AttributeProto.GRAPH:
                    stack.append(attribute.g)
                elif attribute.type == onnx.AttributeProto.GRAPHS:
                    stack.extend(attribute.graphs)


def _text_fields(model: onnx.ModelProto) -> Iterator[tuple[object, str]]:
    yield model, "producer_name"
    yield model, "producer_version"
    for opset in model.opset_import:
        yield opset, "domain"
    for graph in _graphs(model.graph):
        yield graph, "name"
        for node in graph.node:
            yield node, "name"
            yield node, "op_type"
            yield node, "domain"
        for value in (*graph.input, *graph.output, *graph.value_info):
            yield value, "name"
        for tensor in graph.initializer:
            yield tensor, "name"
    for function in model.functions:
        yield function, "name"
        yield function, "domain"
        for node in function.node:
            yield node, "name"
            yield node, "op_type"
            yield node, "domain"


def _repeated_text_fields(model: onnx.ModelProto) -> Iterator[MutableSequence[str]]:
    for graph in _graphs(model.graph):
        for node in graph.node:
            yield node.input
            yield node.output
    for function in model.functions:
        yield function.input
        yield function.output
        for node in function.node:
            yield node.input
            yield node.output
