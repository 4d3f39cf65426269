"""Loading an ONNX file for profiling: validate, inline, bind dims, infer shapes, convert.

Weights are never read: the file is parsed with ``load_external_data=False``,
the values of large inline initializers of the main graph are left out while it
is read (``gate.model.skeleton``), and every size comes from an initializer's
dims and dtype. The steps, in order:

1. refuse what is not a model, with one line naming the file and the remedy
   (missing, empty, Git LFS pointer, truncated, random bytes, a protobuf that is
   not a model, no graph, an opset or IR version newer than the installed onnx,
   a negative dim, a weight with more elements than any file can hold);
2. inline local functions (their nodes become ordinary layers);
3. bind whole inputs (``--shape images=1x3x640x640``, ``gate.model.shapes``) and
   symbolic dims (``--dim batch=1``) on every declared tensor shape;
4. drop inline weight values from memory (shapes and dtypes stay), then run onnx
   shape inference with data propagation from the inputs alone, and refuse a
   stored intermediate or output shape that contradicts it, in the main graph
   and every subgraph (``gate.model.stored_shapes.infer_checked``; files over
   2 GB go through the path-based API in a temporary folder, checked the same
   way; the input is never overwritten);
5. where a tensor is still unsized, evaluate the shape arithmetic that computes
   Reshape targets, Pad amounts, ... from the inputs' shapes and infer again
   (``gate.model.shape_values`` with the rules of ``gate.model.shape_rules``);
6. convert to the immutable ``gate.model.graph`` types (``gate.model.convert``)
   and note, once per cause, what stays unsized and the flag that fixes it.
"""

from __future__ import annotations

import ctypes
import functools
import math
import os
import sys
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import onnx
import onnx.inliner
import onnx.shape_inference
from google.protobuf.message import DecodeError

from gate.errors import InputError, near_name, one_safe_line
from gate.model.contrib_shapes import register_contrib_schemas
from gate.model.convert import (
    UNKNOWN_DIM,
    all_graph_protos,
    convert_model,
    drop_tensor_values,
    drop_weight_values,
    external_data_warning,
    graph_symbolic_dims,
)
from gate.model.graph import INT64_MAX, Graph, LoadedModel
from gate.model.guards import refuse_huge_shape_data
from gate.model.shape_text import MAX_DIM, StaticShape
from gate.model.shape_values import refine_shapes
from gate.model.shapes import bind_input_shapes, sizing_notes
from gate.model.skeleton import file_without_weights, without_weights
from gate.model.stored_shapes import infer_checked
from gate.model.text import repair_text_fields

# Files at least this large go through the path-based shape inference (protobuf's
# in-memory serialisation limit is 2 GiB).
PATH_INFERENCE_BYTES = 2 * 1024**3

_LFS_MAGIC = b"version https://git-lfs"
_VALIDATE_REMEDY = "re-export the model, or check the file is the .onnx model itself"


def load_model(path: str | os.PathLike[str], dims: Mapping[str, int] | None = None,
               shapes: Mapping[str, StaticShape] | None = None, *,
               data: bytes | None = None) -> LoadedModel:
    """Load ``path`` for profiling; never reads weights.

    ``data``: the file's bytes, already read (a git blob); ``path`` then only names
    the model in messages and locates its external data, and is never opened.

    ``dims`` binds symbolic dims by name (``--dim``), ``shapes`` binds every dim
    of the named graph inputs (``--shape``). Raises ``InputError`` (exit 2) for
    anything that is not a usable ONNX model, and for a ``shapes`` entry that
    names no input or contradicts the model.
    """
    loaded = _load(os.fspath(path), dims, shapes, data)
    release_freed_memory()  # the parsed protos are gone now; give their pages back
    return loaded


def _load(text_path: str, dims: Mapping[str, int] | None,
          shapes: Mapping[str, StaticShape] | None, data: bytes | None) -> LoadedModel:
    """``load_model``; every proto it parses is freed when it returns."""
    bindings = _check_bindings(dict(dims or {}), text_path)
    shape_bindings = _check_shapes(dict(shapes or {}), text_path)
    size_bytes = _check_file(text_path) if data is None else _check_head(len(data), data, text_path)
    proto = _parse(text_path, data, lean=size_bytes < PATH_INFERENCE_BYTES)
    _validate(proto, text_path)
    warnings: list[str] = []
    repaired = repair_text_fields(proto)
    if repaired:
        warnings.append(f"{repaired} name(s) in the model are not valid UTF-8; they are shown "
                        "with \\xNN escapes (re-export the model to fix them)")
    declared, found = scan_graphs(proto.graph, text_path)
    warnings[:0] = found
    refuse_huge_shape_data(proto, text_path, bindings, shape_bindings)  # before any inference
    register_contrib_schemas()  # shape inference then sizes the contrib ops we cost
    unused = sorted(set(bindings) - declared)
    warnings.extend(_unused_binding_note(name, bindings[name], declared - set(bindings))
                    for name in unused)
    proto = _inline(proto, text_path)
    _refuse_empty_graph(proto, text_path)
    warnings.extend(_unknown_zero_sized_io(proto.graph))
    _bind(proto.graph, bindings, shape_bindings, text_path)
    by_path = size_bytes >= PATH_INFERENCE_BYTES and data is None
    proto, inference_warning = infer_checked(proto, text_path,
                                             _infer_by_path if by_path else _infer_in_memory)
    if inference_warning:
        warnings.append(inference_warning)
    else:
        proto = refine_shapes(proto, frozenset(declared), _infer, text_path)
    release_freed_memory()  # the file as parsed is gone: its pages back before conversion
    graph, more_warnings = convert_model(proto, text_path, frozenset(declared))
    warnings.extend(more_warnings)
    warnings.extend(sizing_notes(graph))
    return LoadedModel(
        path=text_path,
        name=proto.graph.name or Path(text_path).stem,
        graph=graph,
        opsets=_opsets(proto),
        ir_version=int(proto.ir_version),
        producer=" ".join(p for p in (proto.producer_name, proto.producer_version) if p),
        dim_bindings=bindings,
        shape_bindings=shape_bindings,
        unbound_dims=_unbound_dims(graph),
        warnings=tuple(warnings),
        unused_bindings=tuple(unused),
    )



def _unused_binding_note(name: str, value: int, unbound: set[str]) -> str:
    """The note for a dim binding (``--dim`` or ``dims:``) this model does not declare."""
    near = near_name(name, unbound)
    hint = f"; did you mean '{near}'?" if near else ""
    return (f"dim binding {name}={value} (--dim or dims:): the model declares no symbolic dim "
            f"'{name}' (binding ignored{hint})")


def release_freed_memory() -> None:
    """Return the C heap's free pages to the system (glibc ``malloc_trim``; elsewhere nothing).

    Why: a parsed model and its inferred copy take about a kilobyte per node in
    protobuf's C allocations. Once converted they are freed, but glibc keeps the
    pages, and everything analysis allocates afterwards (Python objects live in
    their own arenas) comes on top: a 100k-node profile peaked 40% higher.
    """
    trim = _malloc_trim()
    if trim is not None:
        trim(0)


@functools.cache
def _malloc_trim() -> Any:
    """glibc's ``malloc_trim``, or None where there is none (macOS, musl, Windows)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        return ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):
        return None


def _check_bindings(dims: dict[str, int], path: str) -> dict[str, int]:
    for name, value in dims.items():
        if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= INT64_MAX:
            raise InputError(f"dim binding {name}={str(value)[:40]} is not an integer from 0 to "
                             f"{INT64_MAX} (ONNX dims are int64); use --dim {name}=N", path)
    return dict(sorted(dims.items()))


def _check_shapes(shapes: dict[str, StaticShape], path: str) -> dict[str, StaticShape]:
    for name, shape in shapes.items():
        if not all(isinstance(d, int) and not isinstance(d, bool) and 0 < d <= MAX_DIM
                   for d in shape):
            raise InputError(f"shape binding {name}={shape!r} is not a list of positive "
                             f"int64 sizes; use --shape {name}=D1xD2x...", path)
    return {name: tuple(shape) for name, shape in sorted(shapes.items())}


def _check_file(path: str) -> int:
    """The file's size; refuses missing, empty and Git LFS pointer files."""
    try:
        size_bytes = os.path.getsize(path)
        with open(path, "rb") as handle:
            head = handle.read(len(_LFS_MAGIC))
    except FileNotFoundError:
        if os.path.islink(path):
            raise InputError(f"a link to a missing file ({_link_target(path)}); fetch the "
                             "content it points to (e.g. git annex get) or remove the link",
                             path) from None
        raise InputError("model file not found; check the path", path) from None
    except IsADirectoryError:
        raise InputError("is a directory, not an ONNX model file; pass the .onnx file", path) from None
    except OSError as exc:
        raise InputError(f"cannot read the model file ({exc.strerror}); check its permissions",
                         path) from None
    return _check_head(size_bytes, head, path)


def _link_target(path: str) -> str:
    try:
        return one_safe_line(os.readlink(path))
    except OSError:
        return "unreadable"


def _check_head(size_bytes: int, head: bytes, path: str) -> int:
    if size_bytes == 0:
        raise InputError("model file is empty (0 bytes); re-export it or restore it from git",
                         path)
    if head.startswith(_LFS_MAGIC):
        raise InputError("is a Git LFS pointer, not the model; run `git lfs pull` (in CI, "
                         "check out with LFS enabled)", path)
    return size_bytes


def _parse(path: str, data: bytes | None = None, lean: bool = False) -> onnx.ModelProto:
    """The parsed model; ``lean``: without inline weight values (``gate.model.skeleton``)."""
    try:
        skeleton = None
        if lean:
            skeleton = without_weights(data) if data is not None else file_without_weights(path)
        if skeleton is not None:
            return onnx.load_model_from_string(skeleton)
        if data is not None:
            return onnx.load_model_from_string(data)  # no folder: external data never loaded
        return onnx.load(path, load_external_data=False)
    except DecodeError as exc:
        hint = ("subgraphs nested too deeply for protobuf" if "Depth" in str(exc)
                else "truncated, corrupt, or not an ONNX file")
        raise InputError(f"cannot parse as an ONNX model ({hint}); {_VALIDATE_REMEDY}",
                         path) from None
    except (ValueError, RuntimeError, OSError) as exc:
        raise InputError(f"cannot parse as an ONNX model ({type(exc).__name__}); "
                         f"{_VALIDATE_REMEDY}", path) from None


def _validate(proto: onnx.ModelProto, path: str) -> None:
    """Refuse protobufs that parsed but are not (complete) models."""
    if proto.ir_version <= 0:
        raise InputError(f"not an ONNX model (no IR version: another protobuf, random bytes, "
                         f"or truncated); {_VALIDATE_REMEDY}", path)
    if not proto.HasField("graph"):
        raise InputError(f"ONNX model has no graph (truncated or not a model); "
                         f"{_VALIDATE_REMEDY}", path)
    if not proto.opset_import:
        raise InputError(f"ONNX model declares no opset (truncated?); {_VALIDATE_REMEDY}", path)
    if proto.ir_version > onnx.IR_VERSION:
        raise InputError(f"model IR version {proto.ir_version} is newer than the installed onnx "
                         f"{onnx.__version__} supports (IR {onnx.IR_VERSION}); upgrade onnx "
                         f"(pip install -U onnx)", path)
    known = onnx.defs.onnx_opset_version()
    for opset in proto.opset_import:
        if opset.domain in ("", "ai.onnx") and opset.version > known:
            raise InputError(f"model uses ai.onnx opset {opset.version}, newer than the installed "
                             f"onnx {onnx.__version__} knows (up to {known}); upgrade onnx "
                             f"(pip install -U onnx)", path)


def _refuse_empty_graph(proto: onnx.ModelProto, path: str) -> None:
    """A graph with no node (after local functions are inlined) costs nothing and would
    pass every rule: an export that lost the network, never a model to ship."""
    if not proto.graph.node:
        raise InputError("the model's graph has no nodes: nothing to profile, so a pass "
                         "would check nothing (an export that lost the network?); re-export "
                         "the model, or leave the file out of the model globs", path)


def _unknown_zero_sized_io(graph: onnx.GraphProto) -> list[str]:
    """Make a size-0 dim of a graph input or output unknown, with a note per input.

    Why: an input that is always empty has no work to cost, so every figure came out
    as zero and every rule passed; such a dim is a dynamic axis an exporter wrote as
    0, as others write -1. Unknown, it fails the coverage rule until ``--shape``
    (or ``shapes:``) gives its size.
    """
    weights = {tensor.name for tensor in graph.initializer}
    notes = []
    for value in graph.input:
        zero = _clear_zero_dims(value) if value.name not in weights else []
        if zero:
            notes.append(f"input '{one_safe_line(value.name)}' declares size 0 on axis "
                         f"{', '.join(map(str, zero))}: an empty tensor, most likely a dynamic "
                         "axis exported as 0; roofgate treats it as unknown")
    for value in graph.output:  # its declared 0 would contradict the size --shape gives
        _clear_zero_dims(value)
    return notes


def _clear_zero_dims(value: onnx.ValueInfoProto) -> list[int]:
    """Make each size-0 dim of ``value`` unknown; the axes cleared."""
    if not value.type.HasField("tensor_type"):
        return []
    dims = value.type.tensor_type.shape.dim
    zero = [axis for axis, dim in enumerate(dims)
            if dim.WhichOneof("value") == "dim_value" and dim.dim_value == 0]
    for axis in zero:
        dims[axis].Clear()
    return zero


def _inline(proto: onnx.ModelProto, path: str) -> onnx.ModelProto:
    if not proto.functions:
        return proto
    try:
        return onnx.inliner.inline_local_functions(proto)
    except Exception as exc:  # noqa: BLE001  (the C++ inliner raises assorted types)
        raise InputError(f"cannot inline the model's local functions ({type(exc).__name__}: "
                         f"{str(exc)[:200]}); check the model with onnx.checker", path) from None


def _bind(graph: onnx.GraphProto, dims: Mapping[str, int],
          shapes: Mapping[str, StaticShape], path: str) -> None:
    """Bind whole inputs first, then named dims (given ones over those the inputs imply)."""
    implied = bind_input_shapes(graph, shapes, dims, path) if shapes else {}
    _bind_dims(graph, {**implied, **dims})


def _bind_dims(graph: onnx.GraphProto, bindings: Mapping[str, int]) -> None:
    """Replace bound ``dim_param``s by their values on every declared shape (all scopes)."""
    if not bindings:
        return
    stack = [graph]
    while stack:
        current = stack.pop()
        for value in (*current.input, *current.output, *current.value_info):
            if not value.type.HasField("tensor_type"):
                continue
            for dim in value.type.tensor_type.shape.dim:
                if dim.HasField("dim_param") and dim.dim_param in bindings:
                    dim.dim_value = bindings[dim.dim_param]
        for node in current.node:
            for attribute in node.attribute:
                if attribute.HasField("g"):
                    stack.append(attribute.g)
                stack.extend(attribute.graphs)


def _infer(proto: onnx.ModelProto) -> onnx.ModelProto:
    return onnx.shape_inference.infer_shapes(proto, data_prop=True)


def _infer_in_memory(proto: onnx.ModelProto) -> tuple[onnx.ModelProto, str]:
    try:
        return _infer(proto), ""
    except Exception as exc:  # noqa: BLE001  (inference failure leaves declared shapes only)
        return proto, _inference_failed(exc)


def _infer_by_path(proto: onnx.ModelProto) -> tuple[onnx.ModelProto, str]:
    """Shape inference through files (onnx's path-based API, for models over 2 GiB): the
    weightless ``proto`` is written to a temporary folder, never over the input."""
    with tempfile.TemporaryDirectory(prefix="roofgate-infer-") as folder:
        in_path = os.path.join(folder, "model.onnx")
        out_path = os.path.join(folder, "inferred.onnx")
        try:
            onnx.save(proto, in_path)
            onnx.shape_inference.infer_shapes_path(in_path, out_path, data_prop=True)
            inferred = onnx.load(out_path, load_external_data=False)
            drop_weight_values(inferred.graph)
            return inferred, ""
        except Exception as exc:  # noqa: BLE001
            return proto, _inference_failed(exc)


def _inference_failed(exc: Exception) -> str:
    detail = " ".join(str(exc).split())[:200]
    return (f"onnx shape inference failed ({type(exc).__name__}: {detail}); "
            f"only the shapes declared in the file are used")


def _opsets(proto: onnx.ModelProto) -> dict[str, int]:
    return {("" if o.domain == "ai.onnx" else o.domain): int(o.version)
            for o in proto.opset_import}


def _unbound_dims(graph: Graph) -> tuple[str, ...]:
    return tuple(sorted(d for d in graph_symbolic_dims(graph) if d != UNKNOWN_DIM))


# --- one pass over the parsed file ----------------------------------------------------

def scan_graphs(graph: onnx.GraphProto, path: str) -> tuple[set[str], list[str]]:
    """Everything the loader checks and collects before inference, in one walk of ``graph``
    and its subgraphs: refuses impossible dims (``refuse_impossible_dims``), warns about
    external data outside the model's folder (``gate.model.convert.external_data_warning``),
    collects the declared symbolic dims and drops inline weight values
    (``gate.model.convert.drop_weight_values``). Returns (declared dims, warnings).

    Why one walk: each walk of a 100,000-node proto costs tenths of a second in Python.
    """
    folder = os.path.realpath(Path(path).resolve().parent)
    declared: set[str] = set()
    warnings: list[str] = []
    for current in all_graph_protos(graph):
        for tensor in current.initializer:
            _refuse_impossible_weight(tensor, path)
            if tensor.data_location == onnx.TensorProto.EXTERNAL:
                warning = external_data_warning(tensor, folder)
                if warning:
                    warnings.append(warning)
            else:
                drop_tensor_values(tensor)
        for value in (*current.input, *current.output, *current.value_info):
            if value.type.HasField("tensor_type"):
                _scan_declared_shape(value, declared, path)
    return declared, warnings


def refuse_impossible_dims(graph: onnx.GraphProto, path: str) -> None:
    """Refuse a negative dim on a weight or below -1 on a declared tensor, and a weight too
    large to exist (every scope; ``scan_graphs`` does the same in its one walk).

    Why: a negative dim made a weight count as 0 bytes. ONNX dims are
    non-negative (an unknown size is a named ``dim_param``); some exporters
    write -1 for an unknown size of an input or output, which stays unknown
    (``--shape`` can bind it); a weight's element count must fit in int64.
    """
    for current in all_graph_protos(graph):
        for tensor in current.initializer:
            _refuse_impossible_weight(tensor, path)
        for value in (*current.input, *current.output, *current.value_info):
            if value.type.HasField("tensor_type"):
                _scan_declared_shape(value, set(), path)


def _refuse_impossible_weight(tensor: onnx.TensorProto, path: str) -> None:
    dims = [int(d) for d in tensor.dims]
    if any(d < 0 for d in dims):
        raise InputError(f"weight '{tensor.name}' has a negative dim {dims}; re-export "
                         "the model", path)
    if math.prod(dims) > INT64_MAX:
        raise InputError(f"weight '{tensor.name}' has dims {dims}, more elements than "
                         "an ONNX tensor can hold; re-export the model", path)


def _scan_declared_shape(value: onnx.ValueInfoProto, declared: set[str], path: str) -> None:
    """Refuse a dim below -1 on a declared tensor; add its symbolic dims to ``declared``."""
    values = []
    for dim in value.type.tensor_type.shape.dim:
        kind = dim.WhichOneof("value")
        if kind == "dim_value":
            values.append(dim.dim_value)
        elif kind == "dim_param" and dim.dim_param:
            declared.add(dim.dim_param)
    if values and min(values) < -1:  # -1: "unknown" as some exporters write it
        raise InputError(f"tensor '{value.name}' declares a negative dim {values}; use a "
                         "named dim (dim_param) for a size not known in advance, or "
                         "re-export the model", path)
