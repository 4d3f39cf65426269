"""Whole-input shape bindings (``--shape images=1x3x640x640``) and the notes on what stays unsized.

``--dim NAME=N`` binds a *named* symbolic dim everywhere it appears. Real exports
also store dims with no name, as -1, or with one name shared by dims that differ
at deployment (H and W both ``size``); ``--shape`` binds every dim of one graph
input instead. A name a ``--shape`` gives one value throughout also binds that
name elsewhere (a mask input sharing ``batch`` and ``seq``); a name it gives
several values is forgotten on the model's declared intermediate and output
shapes, so shape inference decides them from the inputs.

``sizing_notes`` says, once per cause, why tensors stay unsized and the flag that
fixes it: an input with unknown dims (``--shape``), a symbolic name shared by
dims of one input (``--dim`` or ``--shape``), or a node whose output size depends
on run-time values (no flag can size it).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import onnx

from gate.errors import InputError
from gate.model.convert import UNKNOWN_DIM, all_graph_protos
from gate.model.graph import Graph, Node, Shape, TensorInfo
from gate.model.shape_text import StaticShape, shape_text

MAX_NOTED_NODES = 3

# ------------------------------------------------------------------ binding

def _input_values(graph: onnx.GraphProto) -> dict[str, onnx.ValueInfoProto]:
    stored = {t.name for t in graph.initializer}
    return {v.name: v for v in graph.input if v.name not in stored}


def _declared_text(value: onnx.ValueInfoProto) -> str:
    dims = value.type.tensor_type.shape.dim
    return " x ".join(str(d.dim_value) if d.HasField("dim_value") else (d.dim_param or "?")
                      for d in dims) or "a scalar"


def _check_binding(value: onnx.ValueInfoProto | None, name: str, shape: StaticShape,
                   dims: Mapping[str, int], known: Sequence[str], path: str) -> None:
    """Refuse a binding that names no input, has the wrong rank, or contradicts the model."""
    flag = f"--shape {name}={shape_text(shape)}"
    if value is None:
        listed = ", ".join(f"'{n}'" for n in known[:10]) or "none"
        raise InputError(f"{flag}: the model has no input '{name}' (its inputs: {listed}); "
                         "name one of them", path)
    if not value.type.HasField("tensor_type"):
        raise InputError(f"{flag}: input '{name}' is not a tensor; --shape binds tensor inputs",
                         path)
    tensor = value.type.tensor_type
    if tensor.HasField("shape") and len(tensor.shape.dim) != len(shape):
        rank = len(tensor.shape.dim)
        raise InputError(f"{flag}: input '{name}' has rank {rank} ({_declared_text(value)}); "
                         f"give {rank} sizes", path)
    for axis, dim in enumerate(tensor.shape.dim if tensor.HasField("shape") else ()):
        if dim.HasField("dim_value") and dim.dim_value >= 0 and dim.dim_value != shape[axis]:
            raise InputError(f"{flag}: dim {axis} of input '{name}' is fixed at {dim.dim_value} "
                             f"in the model; give {dim.dim_value} there", path)
        if dim.HasField("dim_param") and dims.get(dim.dim_param, shape[axis]) != shape[axis]:
            raise InputError(f"{flag}: dim {axis} ('{dim.dim_param}') contradicts --dim "
                             f"{dim.dim_param}={dims[dim.dim_param]}; give one of them", path)


def _named_values(graph: onnx.GraphProto,
                  shapes: Mapping[str, StaticShape]) -> dict[str, set[int]]:
    """Symbolic dim name -> the values the bindings give it (several: H and W sharing one)."""
    inputs = _input_values(graph)
    named: dict[str, set[int]] = {}
    for name, shape in shapes.items():
        for axis, dim in enumerate(inputs[name].type.tensor_type.shape.dim):
            if dim.HasField("dim_param") and dim.dim_param:
                named.setdefault(dim.dim_param, set()).add(shape[axis])
    return named


def bind_input_shapes(graph: onnx.GraphProto, shapes: Mapping[str, StaticShape],
                      dims: Mapping[str, int], path: str) -> dict[str, int]:
    """Set every dim of each input named in ``shapes``; the dim names that implies.

    Returns the symbolic dims the bindings give exactly one value (to bind
    everywhere, as ``--dim`` would). Names given several values are cleared from
    the declared intermediate and output shapes of every scope.
    """
    inputs = _input_values(graph)
    for name, shape in shapes.items():
        _check_binding(inputs.get(name), name, shape, dims, sorted(inputs), path)
    named = _named_values(graph, shapes)
    for name, shape in shapes.items():
        tensor = inputs[name].type.tensor_type
        tensor.shape.Clear()
        for size in shape:
            tensor.shape.dim.add().dim_value = size
    _forget_dim_names(graph, {n for n, values in named.items() if len(values) > 1})
    return {n: values.pop() for n, values in named.items() if len(values) == 1}


def _forget_dim_names(graph: onnx.GraphProto, names: set[str]) -> None:
    if not names:
        return
    for scope in all_graph_protos(graph):
        for value in (*scope.output, *scope.value_info):
            for dim in value.type.tensor_type.shape.dim:
                if dim.HasField("dim_param") and dim.dim_param in names:
                    dim.Clear()


# ------------------------------------------------------------------ notes on what stays unsized

def _is_unknown(tensor: TensorInfo | None) -> bool:
    """No rank, or a dim with neither a size nor a declared name (symbolic names are known)."""
    return tensor is not None and (tensor.shape is None or UNKNOWN_DIM in tensor.shape)


def _suggested(shape: Shape) -> str:
    return shape_text(["N" if d == UNKNOWN_DIM else d for d in shape])


def _input_note(tensor: TensorInfo) -> str:
    name = tensor.name
    if tensor.shape is None:
        return (f"input '{name}' declares no shape, so the layers that read it are not "
                f"modelled: bind it with --shape {name}=D1xD2x... (the sizes you deploy)")
    if UNKNOWN_DIM in tensor.shape:
        count = sum(1 for d in tensor.shape if d == UNKNOWN_DIM)
        return (f"input '{name}' has {count} dim(s) with neither a size nor a name "
                f"({' x '.join(str(d) for d in tensor.shape)}), so the layers that depend on "
                f"it are not modelled: bind the whole input with --shape "
                f"{name}={_suggested(tensor.shape)} (N: the size you deploy)")
    shared = [d for d in dict.fromkeys(tensor.symbolic_dims()) if tensor.shape.count(d) > 1]
    if shared:
        dim = shared[0]
        axes = " and ".join(str(i) for i, d in enumerate(tensor.shape) if d == dim)
        return (f"input '{name}' uses the symbolic dim '{dim}' for dims {axes}: --dim {dim}=N "
                f"gives them one value; to give each its own, bind the whole input with "
                f"--shape {name}={shape_text(tensor.shape)}")
    return ""


def _used_names(graph: Graph) -> set[str]:
    used = {t.name for t in graph.outputs}
    for node in graph.nodes:
        used.update(t.name for t in node.inputs if t is not None)
    return used


def _origins(graph: Graph) -> list[tuple[Node, TensorInfo]]:
    """Nodes whose inputs are all sized (or symbolic) but that leave a used output unsized."""
    used = _used_names(graph)
    found = []
    for node in graph.nodes:
        if any(_is_unknown(t) for t in node.inputs):
            continue
        lost = next((t for t in node.outputs if t.name in used and _is_unknown(t)), None)
        if lost is not None:
            found.append((node, lost))
    return found


def _origin_note(graph: Graph, has_symbolic: bool) -> str:
    if not any(_is_unknown(t) for node in graph.nodes for t in node.outputs):
        return ""  # the usual case: no unsized output, so no origin to look for
    origins = _origins(graph)
    if not origins:
        return ""
    unsized = sum(1 for n in graph.nodes for t in n.outputs if t.name and _is_unknown(t))
    where = ", ".join(f"node '{node.name}' ({node.op_type}, output '{tensor.name}')"
                      for node, tensor in origins[:MAX_NOTED_NODES])
    more = f" and {len(origins) - MAX_NOTED_NODES} more" if len(origins) > MAX_NOTED_NODES else ""
    remedy = ("bind the symbolic dims (--dim NAME=N) and they may be sized" if has_symbolic
              else "no --shape or --dim can size them")
    return (f"{unsized} tensor(s) stay unsized (the layers that use them are not modelled), "
            f"starting at {where}{more}: their size depends on values roofgate cannot work "
            f"out before run time (data, or arithmetic it does not follow); {remedy}")


def sizing_notes(graph: Graph) -> list[str]:
    """One note per cause of unsized tensors, each with the flag that fixes it (if any)."""
    notes = [note for note in (_input_note(t) for t in graph.inputs) if note]
    has_symbolic = any(t.symbolic_dims() for t in graph.inputs)
    origin = _origin_note(graph, has_symbolic)
    return notes + ([origin] if origin else [])
