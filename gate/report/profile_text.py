"""Formatting for ``roofgate profile``: a text table, JSON and CSV (field names in docs/profile.md).

Only formats: every figure comes from the ``ModelProfile``, the ``ModelCost``
per target and the ``RunRecord`` built from them. Model-supplied strings have
control characters stripped in the table; CSV text cells that a spreadsheet
would run as a formula get a leading apostrophe; JSON escapes by itself.
"""

from __future__ import annotations

import csv
import io
import unicodedata
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import replace
from functools import lru_cache
from typing import Any

from gate import metrics, units
from gate.costmodel import FUSION_MEMBER, ModelCost
from gate.jsontext import encode_one_line
from gate.logsafe import defuse_json_markers, defuse_runner_markers
from gate.model.graph import Shape, TensorInfo, cached_call
from gate.profile import LayerProfile, ModelProfile
from gate.records import RunRecord, layer_to_dict, no_work_costed, run_to_dict
from gate.targets.spec import TargetProfile

FORMAT_NAME = "roofgate-profile"
# The JSON document's version, under the key ``version`` like every roofgate document.
# History: 1 first version (key ``format_version``); 2 the key is ``version``, as in the
# snapshot and result documents.
FORMAT_VERSION = 2

Run = tuple[TargetProfile, ModelCost]

CSV_FIELDS: tuple[str, ...] = (
    "index", "name", "op_type", "domain", "input_shapes", "input_dtypes", "output_shapes",
    "output_dtypes", "param_names", "param_count", "param_bytes", "input_bytes", "output_bytes",
    "macs", "flops", "arithmetic_intensity", "param_reuse", "modelled", "unmodelled_reason",
    "precision", "role",
)
CSV_TARGET_FIELDS: tuple[str, ...] = (
    "target", "engine", "bound", "utilization", "cycles", "latency_s", "energy_j",
    "param_dram_bytes", "act_dram_bytes", "fused_into", "fused_ops",
)


def render(fmt: str, profile: ModelProfile, runs: Sequence[Run],
           records: Sequence[RunRecord]) -> str:
    """The whole output of ``roofgate profile`` in ``fmt`` (table, json or csv)."""
    return "".join(render_chunks(fmt, profile, runs, records))


def render_chunks(fmt: str, profile: ModelProfile, runs: Sequence[Run],
                  records: Sequence[RunRecord]) -> Iterator[str]:
    """``render`` in pieces to write one after another (JSON is built as it is written)."""
    if fmt == "json":
        return json_chunks(profile, records)
    if fmt == "csv":  # CSV keeps model text as is, apart from runner markers (gate/logsafe)
        return iter([_defused(to_csv(profile, runs))])
    return (_defused(chunk) for chunk in table_chunks(profile, runs))


def _defused(text: str) -> str:
    """``defuse_runner_markers``, skipped when no marker can be in the text: every marker
    holds ``##`` or ``::`` (two substring searches instead of two regex passes)."""
    return defuse_runner_markers(text) if "##" in text or "::" in text else text


# ------------------------------------------------------------------ JSON

@lru_cache(maxsize=1 << 16)  # graphs repeat a few shapes across many layers
def shape_text(shape: Shape | None) -> str:
    return "?" if shape is None else "x".join(map(str, shape)) or "scalar"


def layer_dict(layer: LayerProfile, inputs: Sequence[TensorInfo | None],
               outputs: Sequence[TensorInfo]) -> dict[str, Any]:
    """One row of the profile's ``layers``; ``inputs`` and ``outputs`` are the layer's node's
    tensors (their names; an omitted input is None). Keys in sorted order, as the JSON
    writer sorts them: sorting a sorted row is one pass instead of a sort per row of a
    large model."""
    return {
        "arithmetic_intensity": layer.arithmetic_intensity, "bytes_moved": layer.bytes_moved,
        "domain": layer.domain, "flops": layer.flops, "index": layer.index,
        "input_bytes": layer.input_bytes,
        "inputs": [None if shape is None and not dtype else  # an omitted input: no dtype
                   {"dtype": dtype, "name": tensor.name if tensor else "",
                    "shape": None if shape is None else list(shape)}
                   for tensor, shape, dtype in zip(inputs, layer.input_shapes,
                                                   layer.input_dtypes)],
        "macs": layer.macs, "modelled": layer.modelled, "name": layer.name,
        "note": layer.work.note if layer.work else "", "op_type": layer.op_type,
        "output_bytes": layer.output_bytes,
        "outputs": [{"dtype": dtype, "name": tensor.name,
                     "shape": None if shape is None else list(shape)}
                    for tensor, shape, dtype in zip(outputs, layer.output_shapes,
                                                    layer.output_dtypes)],
        "param_bytes": layer.param_bytes, "param_count": layer.param_count,
        "param_names": list(layer.param_names), "param_reuse": layer.param_reuse,
        "precision": layer.precision, "role": layer.role,
        "unmodelled_reason": layer.unmodelled_reason,
    }


def profile_dict(profile: ModelProfile, records: Sequence[RunRecord]) -> dict[str, Any]:
    """The JSON document (plain data, stable keys)."""
    return {**_document_head(profile), "layers": list(_layer_dicts(profile)),
            "targets": [run_to_dict(record) for record in records]}


def _layer_dicts(profile: ModelProfile) -> Iterator[dict[str, Any]]:
    for layer, node in zip(profile.layers, profile.model.graph.nodes):
        yield layer_dict(layer, node.inputs, node.outputs)


def _document_head(profile: ModelProfile) -> dict[str, Any]:
    """The document without its per-layer lists (``layers``, ``targets``)."""
    model, coverage = profile.model, profile.coverage
    unknown = no_work_costed(profile.coverage.nodes_total,
                             profile.coverage.nodes_total - profile.coverage.nodes_modelled,
                             bool(profile.total_macs or profile.total_flops))
    return {
        "format": FORMAT_NAME, "version": FORMAT_VERSION,
        "model": {"path": model.path, "name": model.name, "ir_version": model.ir_version,
                  "producer": model.producer, "opsets": dict(model.opsets),
                  "dim_bindings": dict(model.dim_bindings),
                  "shape_bindings": {k: list(v) for k, v in model.shape_bindings.items()},
                  "unbound_dims": list(model.unbound_dims), "warnings": list(model.warnings)},
        "precision": profile.precision,
        "totals": {"layers": len(profile.layers),
                   # unknown (null), never 0, when none of the work could be counted
                   "macs": None if unknown else profile.total_macs,
                   "flops": None if unknown else profile.total_flops,
                   "param_count": profile.total_param_count,
                   "param_bytes": profile.total_param_bytes,
                   "max_layer_param_bytes": max((x.param_bytes for x in profile.layers),
                                                default=0)},
        "coverage": {"nodes_total": coverage.nodes_total,
                     "nodes_modelled": coverage.nodes_modelled,
                     "node_share": coverage.node_share, "work_modelled": coverage.work_modelled,
                     "work_unmodelled_estimate": coverage.work_unmodelled_estimate,
                     "work_share": coverage.work_share,
                     "unmodelled": [{"op_type": u.op_type, "domain": u.domain, "count": u.count,
                                     "reason": u.reason} for u in coverage.unmodelled]},
        "notes": list(profile.notes),
    }


def to_json(profile: ModelProfile, records: Sequence[RunRecord]) -> str:
    return "".join(json_chunks(profile, records))


def json_chunks(profile: ModelProfile, records: Sequence[RunRecord]) -> Iterator[str]:
    """The JSON document in pieces, built while it is written (memory stays bounded).

    Layout: keys sorted, indent 2, except that each element of a ``layers`` list is
    one line (written by the C encoder: a pure-Python indenting encoder was most of
    the time of a large profile). Deterministic: the same profile, the same bytes.
    """
    document = {**_document_head(profile), "layers": _Rows(_layer_dicts(profile)),
                "targets": [{**run_to_dict(replace(record, layers=())),
                             "layers": _Rows(layer_to_dict(x) for x in record.layers)}
                            for record in records]}
    for chunk in _emit(document, ""):
        yield defuse_json_markers(chunk)  # a chunk never ends inside a JSON string
    yield "\n"


class _Rows:
    """A list written one element per line."""

    def __init__(self, items: Iterable[Any]) -> None:
        self.items = items


_ROWS_PER_CHUNK = 256


def _emit(value: Any, indent: str) -> Iterator[str]:
    """``value`` as JSON with ``json.dumps(indent=2, sort_keys=True)``'s layout; ``_Rows``
    one element per line."""
    inner = indent + "  "
    if isinstance(value, _Rows):
        yield from _emit_rows(value.items, indent)
    elif isinstance(value, dict) and value:
        opening = "{\n"
        for key in sorted(value):
            yield f"{opening}{inner}{encode_one_line(key)}: "
            yield from _emit(value[key], inner)
            opening = ",\n"
        yield f"\n{indent}}}"
    elif isinstance(value, list) and value:
        opening = "[\n"
        for item in value:
            yield opening + inner
            yield from _emit(item, inner)
            opening = ",\n"
        yield f"\n{indent}]"
    else:
        yield encode_one_line(value)


def _emit_rows(items: Iterable[Any], indent: str) -> Iterator[str]:
    inner, opening, batch = indent + "  ", "[\n", []
    for item in items:
        batch.append(inner + encode_one_line(item))
        if len(batch) == _ROWS_PER_CHUNK:
            yield opening + ",\n".join(batch)
            opening, batch = ",\n", []
    if batch:
        yield opening + ",\n".join(batch)
        opening = ",\n"
    yield "[]" if opening == "[\n" else f"\n{indent}]"


# ------------------------------------------------------------------ CSV

def _csv_text(value: str) -> str:
    """Neutralise spreadsheet formulas in model-supplied text (common practice, no source)."""
    return "'" + value if value[:1] in ("=", "+", "-", "@", "\t", "\r") else value


def _csv_number(value: float | None) -> str:
    """A number as CSV text: floats exactly (repr), unknown (None) as an empty cell, never 0."""
    if value is None:
        return ""
    return repr(value) if isinstance(value, float) else str(value)


def _csv_row(layer: LayerProfile) -> list[Any]:
    return [
        layer.index, _csv_text(layer.name), _csv_text(layer.op_type), _csv_text(layer.domain),
        ";".join(shape_text(s) for s in layer.input_shapes), ";".join(layer.input_dtypes),
        ";".join(shape_text(s) for s in layer.output_shapes), ";".join(layer.output_dtypes),
        _csv_text(";".join(layer.param_names)), layer.param_count, layer.param_bytes,
        _csv_number(layer.input_bytes), _csv_number(layer.output_bytes),
        _csv_number(layer.macs), _csv_number(layer.flops),
        _csv_number(layer.arithmetic_intensity), _csv_number(layer.param_reuse),
        "true" if layer.modelled else "false", _csv_text(layer.unmodelled_reason),
        layer.precision, layer.role,
    ]


def to_csv(profile: ModelProfile, runs: Sequence[Run]) -> str:
    """One row per layer; with targets, one row per layer per target (target columns added)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    if not runs:
        writer.writerow(CSV_FIELDS)
        writer.writerows(_csv_row(layer) for layer in profile.layers)
        return out.getvalue()
    writer.writerow(CSV_FIELDS + CSV_TARGET_FIELDS)
    for target, cost in runs:
        for layer, lc in zip(profile.layers, cost.layers):
            energy_j = None if lc.energy is None else lc.energy.total_j
            writer.writerow(_csv_row(layer) + [
                _csv_text(target.name), lc.engine, lc.bound, _csv_number(lc.utilization),
                _csv_number(lc.cycles), _csv_number(lc.latency_s), _csv_number(energy_j),
                _csv_number(lc.param_dram_bytes), _csv_number(lc.act_dram_bytes),
                _csv_text(lc.fused_into), ";".join(lc.fused_ops)])
    return out.getvalue()


# ------------------------------------------------------------------ table

def _unprintable(char: str) -> bool:
    """Control, format and private characters (category C) and the Unicode line and
    paragraph separators (Zl, Zp), which some log viewers treat as a new line."""
    category = unicodedata.category(char)
    return category[0] == "C" or category in ("Zl", "Zp")


def clean(text: str, limit: int = 0, *, keep_end: bool = False) -> str:
    """``text`` without control or format characters, cut to ``limit`` characters if given.

    ``keep_end`` cuts in the middle instead, so a long dotted layer name keeps
    both its block prefix and its last part (``block3.attn...q_proj.matmul``).
    """
    if not text.isprintable():  # printable: no category C, Zl or Zp character (fast path)
        text = "".join(" " if _unprintable(ch) else ch for ch in text)
    if limit and len(text) > limit:
        if keep_end:
            head = (limit - 3) // 2
            return text[:head] + "..." + text[len(text) - (limit - 3 - head):]
        return text[: limit - 3] + "..."
    return text


def _widths(rows: list[list[str]]) -> list[int]:
    """Each column's widest cell."""
    return [max(map(len, column)) for column in zip(*rows)]


def _aligned(rows: list[list[str]], widths: list[int], right_from: int) -> Iterator[str]:
    """Columns padded to ``widths`` (left-aligned before ``right_from``, right-aligned
    from it), two spaces apart, each line ending in a newline; in batches of lines. One
    format string for every row (a table may have 100k)."""
    line = "  ".join(f"{{:{'>' if i >= right_from else '<'}{w}}}" for i, w in enumerate(widths))
    for first in range(0, len(rows), _ROWS_PER_CHUNK):
        yield "".join(line.format(*row).rstrip() + "\n"
                      for row in rows[first:first + _ROWS_PER_CHUNK])


def _known(shapes: Sequence[Shape | None]) -> bool:
    """Every (present) tensor's shape is fully numeric, so its byte count is real, not 0."""
    return cached_call(_known_shapes, shapes)


@lru_cache(maxsize=1 << 14)  # layers share their shape tuples: one answer per distinct tuple
def _known_shapes(shapes: Sequence[Shape | None]) -> bool:
    return all(shape is not None and all(isinstance(d, int) for d in shape)
               for shape in shapes if shape != ())


@lru_cache(maxsize=1 << 14)
def _shapes_text(shapes: tuple[Shape | None, ...]) -> str:
    return ";".join(shape_text(s) for s in shapes)


def _layer_cells(layer: LayerProfile) -> list[str]:
    out = cached_call(_shapes_text, layer.output_shapes)
    counted = layer.modelled
    return [str(layer.index), clean(layer.name, 40, keep_end=True), clean(layer.op_type, 24),
            clean(out, 24), layer.precision if layer.role == "layer" else layer.role,
            units.fmt_count(layer.macs),  # '?' when not modelled (None), never 0
            units.fmt_count(layer.flops),
            units.fmt_bytes(layer.param_bytes),
            units.fmt_bytes(layer.input_bytes) if _known(layer.input_shapes) else "?",
            units.fmt_bytes(layer.output_bytes) if _known(layer.output_shapes) else "?",
            units.fmt_plain(layer.arithmetic_intensity),
            units.fmt_plain(layer.param_reuse) if not counted or layer.param_bytes else "-"]


def _header(label: str) -> tuple[str, str]:
    """A column label on two header lines, split at the space nearest its middle, so
    spelled-out labels keep the table narrow (``parameter`` over ``size``)."""
    spaces = [k for k, char in enumerate(label) if char == " "]
    if not spaces:
        return "", label
    cut = min(spaces, key=lambda k: abs(2 * k - len(label)))
    return label[:cut], label[cut + 1:]


# Column labels spelled out from the metric catalogue, each on two header lines.
_HEAD = [_header(text) for text in (
    "#", "layer", "op", "output shape", "precision", metrics.label("macs"),
    metrics.label("flops"), metrics.label("param_bytes"), metrics.label("input_bytes"),
    metrics.label("output_bytes"), metrics.label("arithmetic_intensity"),
    metrics.label("param_reuse"))]
_TARGET_HEAD = [_header(text) for text in (
    metrics.label("utilization"), "bound", metrics.label("latency_s"))]
LEGEND = (f"columns: {metrics.label('arithmetic_intensity')} in FLOP per byte of parameters, "
          f"inputs and outputs; {metrics.label('param_reuse')} = weight reuse")
TARGET_LEGEND = (f"target columns: {metrics.label('utilization')} = share of the PE array kept "
                 "busy; bound = what limits the layer (compute, memory, overhead, none; '+' "
                 "heads a fused group that costs the layers marked 'fusion-member')")
MARKS = ("marks: - not applicable; precision: what the layer runs at (folded: "
         "computed offline from constants; qdq-absorbed: a quantize/dequantize pair the layers "
         "beside it absorb)")
UNMODELLED_MARKS = "; ! layer not modelled (see coverage); ? unknown (not modelled or size unknown)"


def to_table(profile: ModelProfile, runs: Sequence[Run]) -> str:
    """A readable per-layer table, totals, coverage, unmodelled ops and notes.

    With targets, each target adds a group of columns under its name (a
    side-by-side matrix) and a line of model totals below the table.
    """
    return "".join(table_chunks(profile, runs))


def table_chunks(profile: ModelProfile, runs: Sequence[Run]) -> Iterator[str]:
    """``to_table`` in pieces of whole lines: the aligned rows are written in batches
    rather than joined into one string (a 100k-layer table is 15 MB)."""
    model = profile.model
    dims = " ".join([*(f"{k}={v}" for k, v in model.dim_bindings.items()),
                     *(f"{k}={shape_text(v)}" for k, v in model.shape_bindings.items())]) or "none"
    opsets = ", ".join(f"{domain or 'ai.onnx'} {version}"
                       for domain, version in model.opsets.items())
    lines = [f"model: {clean(model.name, 80)} ({clean(model.path, 120)})",
             (f"precision: {profile.precision}   dims: {clean(dims, 120)}   "
              f"opsets: {clean(opsets, 120)}"),
             ""]
    flagged = any(not layer.modelled for layer in profile.layers)
    head = list(_HEAD) + [cell for _ in runs for cell in _TARGET_HEAD] + \
        ([("", "!")] if flagged else [])
    rows = [[top for top, _ in head], [bottom for _, bottom in head]] + \
        [_row(i, layer, runs, flagged) for i, layer in enumerate(profile.layers)]
    widths = _widths(rows)
    if runs:
        lines.append(_group_line(widths, [clean(target.name, 40) for target, _ in runs]))
    yield "".join(line + "\n" for line in lines)
    yield from _aligned(rows, widths, right_from=5)
    lines = ["", LEGEND, *([TARGET_LEGEND] if runs else []),
             MARKS + (UNMODELLED_MARKS if flagged else "")]
    lines += ["", *_totals_lines(profile), *_coverage_lines(profile)]
    for target, cost in runs:
        lines += _target_lines(target, cost, profile)
    lines += _notes_lines(profile)
    yield "".join(line + "\n" for line in lines)


def _row(i: int, layer: LayerProfile, runs: Sequence[Run], flagged: bool) -> list[str]:
    cells = _layer_cells(layer)
    for _, cost in runs:
        lc = cost.layers[i]
        if not layer.modelled:  # its cost is unknown, not nothing
            cells += [units.UNKNOWN, "-", units.UNKNOWN]
            continue
        bound = FUSION_MEMBER if lc.fused_into else lc.bound + ("+" if lc.fused_ops else "")
        cells += [units.fmt_share(lc.utilization) if lc.engine == "array" else "-", bound,
                  units.fmt_seconds(lc.latency_s)]
    if flagged:
        cells.append("" if layer.modelled else "!")
    return cells


def _group_line(widths: list[int], names: list[str]) -> str:
    """The line above the header naming each target over its group of columns."""
    start = sum(w + 2 for w in widths[:len(_HEAD)])
    line = " " * start
    for k, name in enumerate(names):
        first = len(_HEAD) + k * len(_TARGET_HEAD)
        span = sum(w + 2 for w in widths[first:first + len(_TARGET_HEAD)]) - 2
        label = name if len(name) <= span else name[: max(span - 3, 1)] + "..."
        line += label.center(span, "-" if len(label) + 2 <= span else " ") + "  "
    return line.rstrip()


def _totals_lines(profile: ModelProfile) -> list[str]:
    cov = profile.coverage
    modelled = "" if cov.nodes_modelled == cov.nodes_total else f" ({cov.nodes_modelled} modelled)"
    unknown = no_work_costed(cov.nodes_total, cov.nodes_total - cov.nodes_modelled,
                             bool(profile.total_macs or profile.total_flops))
    macs, flops = (None, None) if unknown else (profile.total_macs, profile.total_flops)
    return [(f"total: {len(profile.layers)} layers{modelled}, {units.fmt_count(macs)} MACs, "
             f"{units.fmt_count(flops)} FLOPs, {units.fmt_count(profile.total_param_count)} parameters "
             f"({units.fmt_bytes(profile.total_param_bytes)}, shared ones counted once)")]


MAX_UNMODELLED_LINES = 12


def _coverage_lines(profile: ModelProfile) -> list[str]:
    """Coverage, then one line per reason layers went unmodelled (op types grouped under it,
    so a hint such as an unbound dim's ``--dim`` is said once)."""
    cov = profile.coverage
    lines = [(f"coverage: {cov.nodes_modelled}/{cov.nodes_total} layers modelled "
              f"({units.fmt_share(cov.node_share)}), work share "
              f"{units.fmt_share(cov.work_share)}")]
    groups: dict[str, list[str]] = {}
    for op in cov.unmodelled:
        name = f"{op.domain}.{op.op_type}" if op.domain else op.op_type
        groups.setdefault(op.reason, []).append(f"{clean(name, 60)} x{op.count}")
    for reason, ops in list(groups.items())[:MAX_UNMODELLED_LINES]:
        shown = ", ".join(ops[:MAX_UNMODELLED_LINES])
        more = f" and {len(ops) - MAX_UNMODELLED_LINES} more op types" \
            if len(ops) > MAX_UNMODELLED_LINES else ""
        lines.append(f"  unmodelled: {shown}{more}: {clean(reason, 200)}")
    rest = list(groups)[MAX_UNMODELLED_LINES:]
    if rest:
        lines.append(f"  ... {len(rest)} more reasons; --format json lists every unmodelled op")
    return lines


def _notes_lines(profile: ModelProfile) -> list[str]:
    """The profile's notes, without those that repeat a coverage reason already printed."""
    reasons = {op.reason for op in profile.coverage.unmodelled if op.reason}
    notes = [note for note in profile.notes
             if not any(note.startswith(reason) for reason in reasons)]
    return ["", "notes:"] + [f"  - {clean(note, 300)}" for note in notes] if notes else []


def _target_lines(target: TargetProfile, cost: ModelCost, profile: ModelProfile) -> list[str]:
    """The model totals on one target; partial coverage makes them lower bounds, said so."""
    cov = profile.coverage
    name = clean(target.name, 60)
    if no_work_costed(cov.nodes_total, cov.nodes_total - cov.nodes_modelled,
                      bool(profile.total_macs or profile.total_flops)):
        return ["", (f"on {name} ({cost.precision}): not costed: no layer could be modelled "
                     "(see coverage above)")]
    lines = ["", (f"on {name} ({cost.precision}): latency {units.fmt_seconds(cost.latency_s)} "
                  f"({units.fmt_count(cost.inferences_per_s)} inferences/s), "
                  f"energy {units.fmt_joules(cost.energy.total_j)}, "
                  f"{metrics.label('utilization')} {units.fmt_share(cost.utilization)}, parameter DRAM "
                  f"{units.fmt_bytes(cost.param_dram_bytes)}, activation DRAM "
                  f"{units.fmt_bytes(cost.act_dram_bytes)}, weights "
                  f"{'resident on chip' if cost.weights_resident else 'streamed from DRAM'}")]
    fused = sum(1 for layer in cost.layers if layer.fused_into)
    if fused:
        heads = [layer for layer in cost.layers if layer.fused_ops]
        shown = ", ".join(clean("+".join((head.name, *head.fused_ops)), 80) for head in heads[:3])
        more = f", ... ({len(heads) - 3} more in --format json)" if len(heads) > 3 else ""
        lines.append(f"  fused: {fused} layers run inside {len(heads)} groups as the target "
                     f"declares (--no-fusion: layer by layer): {shown}{more}")
    if cov.nodes_modelled < cov.nodes_total:
        lines.append(f"  lower bounds: only {cov.nodes_modelled}/{cov.nodes_total} layers "
                     f"({units.fmt_share(cov.work_share)} of the work) are modelled")
    return lines
