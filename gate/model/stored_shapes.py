"""Stored shapes checked against the inputs, in every graph scope.

onnx's own (non-strict) shape inference keeps the intermediate shapes a file
stores (``value_info``) and its declared output shapes even when the inputs
say otherwise, so a model whose input was resized after export was costed at
its old size. ``infer_checked`` therefore runs inference without them, in the
main graph and in every subgraph (If branches, Loop and Scan bodies, nested to
any depth), and compares: a stored shape that contradicts the derived one is an
InputError naming the tensor (and the subgraph it lives in); a stored shape
inference cannot derive (after a custom op, a loop-carried size) is kept, and
inference runs once more so what follows it is shaped too.

How inference is run is the caller's (gate/model/loader.py): in memory, or
through onnx's path-based API for files over 2 GiB; both go through here, so
the check holds on either path. onnx's strict mode flags the same
contradictions (``infer_shapes(..., strict_mode=True)``; tests compare with it).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import onnx
from onnx import AttributeProto

from gate.errors import InputError

# Run shape inference on a model: (the inferred model, "" or a warning when it failed).
Infer = Callable[[onnx.ModelProto], tuple[onnx.ModelProto, str]]
# A value's place: the scope (a path of node index and attribute from the main graph) and
# its name. Inference keeps node order and attributes, so a place means the same tensor
# in the stored and in the inferred model.
Place = tuple[str, str]


def infer_checked(proto: onnx.ModelProto, path: str, infer: Infer) -> tuple[onnx.ModelProto, str]:
    """Shape inference from the inputs alone, checked against every shape the file stores.

    ``proto`` itself is stripped of its stored shapes for the first inference, and put
    back as it was when that inference fails. Why not a stripped copy: a copy of a
    100k-node model is tens of megabytes, at the moment memory peaks.
    """
    scopes = list(_scopes(proto.graph))  # one walk over the nodes for both uses
    stored, labels = _stored(scopes)
    removed = [(graph, _strip(graph)) for _key, _label, graph in scopes]
    inferred, warning = infer(proto)
    if warning:  # inference failed: the stored shapes are all there is
        for graph, (value_info, output_types) in removed:
            _unstrip(graph, value_info, output_types)
        return infer(proto)
    derived = _derived(inferred.graph, stored)
    unverified = [place for place, value in stored.items()
                  if not _same_or_unknown(value, derived.get(place), labels[place[0]], path)]
    if not unverified:
        return inferred, ""
    for key, _label, graph in _scopes(inferred.graph):
        _restore(graph, [stored[place] for place in unverified if place[0] == key])
    return infer(inferred)


def _scopes(graph: onnx.GraphProto) -> Iterator[tuple[str, str, onnx.GraphProto]]:
    """(key, words for messages, graph) of the main graph and every subgraph, depth first."""
    stack: list[tuple[str, str, onnx.GraphProto]] = [("", "", graph)]
    while stack:
        key, label, current = stack.pop()
        yield key, label, current
        for index, node in enumerate(current.node):
            if not len(node.attribute):  # most nodes: no subgraph to look into, no name needed
                continue
            name = node.name or f"{node.op_type} #{index}"
            for attribute in node.attribute:
                subgraphs = [attribute.g] if attribute.type == AttributeProto.GRAPH else \
                    list(attribute.graphs) if attribute.type == AttributeProto.GRAPHS else []
                for k, sub in enumerate(subgraphs):
                    where = f"{attribute.name}[{k}]" if attribute.type == AttributeProto.GRAPHS \
                        else attribute.name
                    stack.append((f"{key}/{index}.{where}",
                                  f"{where} of node '{name}'" + (f", in {label}" if label else ""),
                                  sub))


def _stored(scopes: list[tuple[str, str, onnx.GraphProto]]
            ) -> tuple[dict[Place, onnx.ValueInfoProto], dict[str, str]]:
    """Every value_info and output of every scope by place, and each scope's words."""
    values: dict[Place, onnx.ValueInfoProto] = {}
    labels: dict[str, str] = {}
    for key, label, current in scopes:
        labels[key] = label
        for value in current.value_info:
            values[(key, value.name)] = value  # stays readable when stripped from the graph
        for value in current.output:
            kept = onnx.ValueInfoProto()  # a copy: stripping clears the output's shape in place
            kept.CopyFrom(value)
            values[(key, value.name)] = kept
    return values, labels


def _derived(graph: onnx.GraphProto,
             places: dict[Place, onnx.ValueInfoProto]) -> dict[Place, onnx.ValueInfoProto]:
    """What ``_stored`` gives for ``places`` only (an output over a value_info of its name,
    as there), without a dict entry for every tensor inference typed: the file usually
    stores a few shapes, inference a shape per tensor."""
    wanted: dict[str, set[str]] = {}
    for key, name in places:
        wanted.setdefault(key, set()).add(name)
    found: dict[Place, onnx.ValueInfoProto] = {}
    # the main graph alone (the usual case) needs no walk over the nodes for subgraphs
    scopes = [("", "", graph)] if wanted.keys() <= {""} else _scopes(graph)
    for key, _label, current in scopes if wanted else ():
        names = wanted.get(key)
        if not names:
            continue
        outputs = {value.name: value for value in current.output if value.name in names}
        if len(outputs) < len(names):
            for value in current.value_info:
                if value.name in names and value.name not in outputs:
                    found[(key, value.name)] = value
        found.update(((key, name), value) for name, value in outputs.items())
    return found


def _strip(graph: onnx.GraphProto) -> tuple[list[onnx.ValueInfoProto], list[onnx.TypeProto]]:
    """Forget the stored intermediate shapes and the output shapes of one scope; returns
    what ``_unstrip`` needs to put them back (the value_info, a copy of each output type)."""
    value_info = list(graph.value_info)
    output_types = []
    for output in graph.output:
        output_type = onnx.TypeProto()
        output_type.CopyFrom(output.type)
        output_types.append(output_type)
    del graph.value_info[:]
    for output in graph.output:
        if output.type.HasField("tensor_type"):
            output.type.tensor_type.ClearField("shape")
    return value_info, output_types


def _unstrip(graph: onnx.GraphProto, value_info: list[onnx.ValueInfoProto],
             output_types: list[onnx.TypeProto]) -> None:
    """The scope exactly as before ``_strip``."""
    graph.value_info.extend(value_info)
    for output, output_type in zip(graph.output, output_types):
        output.type.CopyFrom(output_type)


def _same_or_unknown(stored: onnx.ValueInfoProto, derived: onnx.ValueInfoProto | None,
                     scope: str, path: str) -> bool:
    """True when inference derived the tensor's shape at least as fully as the file stores it;
    False when the stored shape knows more (kept, unverified); InputError on a contradiction."""
    mine, theirs = _known_dims(stored), _known_dims(derived)
    if mine is None:
        return True
    if theirs is None:
        return False
    clash = len(mine) != len(theirs) or any(
        a is not None and b is not None and a != b for a, b in zip(mine, theirs))
    if not clash:
        return not any(a is not None and b is None for a, b in zip(mine, theirs))
    where = f" (in the {scope})" if scope else ""
    raise InputError(
        f"tensor '{stored.name}'{where}: the file stores shape {_shape_text(mine)} but its "
        f"inputs give {_shape_text(theirs)}; the stored shapes are stale (an input resized "
        "after export?): re-export the model, or drop value_info and rerun onnx shape "
        "inference", path)


def _known_dims(value: onnx.ValueInfoProto | None) -> list[int | None] | None:
    if value is None or not value.type.HasField("tensor_type") \
            or not value.type.tensor_type.HasField("shape"):
        return None
    return [int(d.dim_value) if d.HasField("dim_value") else None
            for d in value.type.tensor_type.shape.dim]


def _shape_text(dims: list[int | None]) -> str:
    return "[" + ", ".join("?" if d is None else str(d) for d in dims) + "]"


def _restore(graph: onnx.GraphProto, values: list[onnx.ValueInfoProto]) -> None:
    """Put stored shapes inference could not derive back: outputs in place, the rest as
    value_info."""
    if not values:
        return
    outputs = {o.name: o for o in graph.output}
    replaced = {v.name for v in values}
    kept = [v for v in graph.value_info if v.name not in replaced]
    del graph.value_info[:]
    graph.value_info.extend(kept)
    for value in values:
        if value.name in outputs:
            outputs[value.name].type.CopyFrom(value.type)
        else:
            graph.value_info.append(value)
