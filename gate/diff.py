"""Per-layer diff of two records of the same model on the same target.

Layers are matched in three passes, each on the layers the previous left over:

1. **name**: same node name and op type. Only names that are non-empty and unique
   on both sides count, and the op type must agree, so an exporter that renumbers
   ``node_5`` onto a different op does not pair a Conv with a Relu.
2. **signature**: the remaining layers of both sides, in graph order, are aligned
   as two sequences of ``LayerRecord.signature`` (op type + input/output shapes and
   dtypes) with a longest-matching-block alignment (``difflib.SequenceMatcher``,
   no junk heuristic). An exporter that renames every node still yields a diff.
3. **op_type**: inside each stretch the signature pass could not align (the
   layers between two aligned runs), layers are aligned again by op type alone.
   That pairs a layer whose shapes changed (a widened convolution) with its old
   self, reported as changed rather than as one removal plus one addition.

What is left is added (head only) or removed (base only). A matched layer whose
figures are unknown on a side (not modelled) and whose known figures agree is
``unknown``: never ``unchanged``, never a 0 delta. Values are compared
with the metric catalogue's change tolerance (``gate.metrics.unchanged``), the
one every report uses, so a baseline read back from a snapshot, whose floats
are rounded, does not show every layer as changed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from difflib import SequenceMatcher
from itertools import pairwise

from gate import metrics
from gate.records import LayerRecord, Metric, RunRecord
from gate.result import LayerChange, RunDiff

ADDED, REMOVED, CHANGED, UNCHANGED = "added", "removed", "changed", "unchanged"
# A matched layer whose known figures agree but some figure is unknown on a side (a layer
# not modelled): it cannot be called unchanged, and nothing known changed.
UNKNOWN = "unknown"

Pair = tuple[int, int]  # (base index, head index)


def diff_runs(base: RunRecord, head: RunRecord) -> RunDiff:
    """The diff of ``head`` against ``base`` (same model and target expected)."""
    pairs = match_layers(base.layers, head.layers)
    return RunDiff(
        model=head.model,
        target=head.target,
        totals=_totals(base, head),
        layers=_changes(base.layers, head.layers, pairs),
    )


def match_layers(base: Sequence[LayerRecord], head: Sequence[LayerRecord],
                 ) -> dict[int, tuple[int, str]]:
    """Map head index -> (base index, how matched) for every matched layer."""
    matched: dict[int, tuple[int, str]] = {}
    for b, h in _match_by_name(base, head):
        matched[h] = (b, "name")
    used_base = {b for b, _ in matched.values()}
    rest_base = [i for i in range(len(base)) if i not in used_base]
    rest_head = [i for i in range(len(head)) if i not in matched]
    for b, h, how in _align_rest(base, head, rest_base, rest_head):
        matched[h] = (b, how)
    return matched


def metric_deltas(base: LayerRecord | RunRecord, head: LayerRecord | RunRecord,
                  ) -> dict[str, tuple[Metric, Metric]]:
    """Metrics present on both sides whose values differ (beyond float rounding)."""
    return {
        name: (base.metrics[name], head.metrics[name])
        for name in sorted(set(base.metrics) & set(head.metrics))
        if not metrics.unchanged(name, base.metrics[name], head.metrics[name])
    }


def same_value(a: Metric, b: Metric) -> bool:
    """Equal within the catalogue's change tolerance; an unknown value (None) equals
    nothing, so unknown figures always show (as '?'), never as unchanged."""
    return metrics.unchanged("", a, b)


def ranked_changes(diff: RunDiff, limit: int | None = None) -> list[LayerChange]:
    """Added, removed and changed layers, most important first.

    Importance is the layer's latency change in seconds (an added or removed
    layer counts its whole latency), then the largest relative change of any
    metric, then the name, so the order is deterministic.
    """
    moved = [c for c in diff.layers if c.status != UNCHANGED]
    moved.sort(key=lambda c: (-abs(latency_change_s(c)), -_largest_ratio(c), _name(c)))
    return moved if limit is None else moved[:limit]


def latency_change_s(change: LayerChange) -> float:
    """head - base latency of a layer change (0.0 when latency did not change)."""
    base, head = change.deltas.get("latency_s", (0.0, 0.0))
    return float(head or 0.0) - float(base or 0.0)  # ranking only: unknown ranks as no change


# --- matching passes ----------------------------------------------------------------

def _match_by_name(base: Sequence[LayerRecord], head: Sequence[LayerRecord]) -> list[Pair]:
    base_index = _unique_names(base)
    head_index = _unique_names(head)
    pairs = []
    for name, h in head_index.items():
        b = base_index.get(name)
        if b is not None and base[b].op_type == head[h].op_type:
            pairs.append((b, h))
    return pairs


def _unique_names(layers: Sequence[LayerRecord]) -> dict[str, int]:
    seen: dict[str, int] = {}
    duplicated: set[str] = set()
    for index, layer in enumerate(layers):
        if layer.name in seen:
            duplicated.add(layer.name)
        seen[layer.name] = index
    return {name: i for name, i in seen.items() if name and name not in duplicated}


def _align_rest(base: Sequence[LayerRecord], head: Sequence[LayerRecord],
                rest_base: list[int], rest_head: list[int]) -> list[tuple[int, int, str]]:
    out: list[tuple[int, int, str]] = []
    signature_pairs = _align([base[i].signature for i in rest_base],
                             [head[i].signature for i in rest_head])
    out.extend((rest_base[b], rest_head[h], "signature") for b, h in signature_pairs)
    # Between two signature-aligned runs, align what is left by op type.
    bounds = [(-1, -1), *signature_pairs, (len(rest_base), len(rest_head))]
    for (b0, h0), (b1, h1) in pairwise(bounds):
        gap_base = rest_base[b0 + 1:b1]
        gap_head = rest_head[h0 + 1:h1]
        if gap_base and gap_head:
            op_pairs = _align([base[i].op_type for i in gap_base],
                              [head[i].op_type for i in gap_head])
            out.extend((gap_base[b], gap_head[h], "op_type") for b, h in op_pairs)
    return out


def _align(left: list[str], right: list[str]) -> list[Pair]:
    """Index pairs of the longest matching blocks of two sequences, in order."""
    matcher = SequenceMatcher(a=left, b=right, autojunk=False)
    return [(block.a + k, block.b + k)
            for block in matcher.get_matching_blocks() for k in range(block.size)]


# --- building the diff ----------------------------------------------------------------

def _totals(base: RunRecord, head: RunRecord) -> dict[str, tuple[Metric, Metric]]:
    return {name: (base.metrics[name], head.metrics[name])
            for name in sorted(set(base.metrics) & set(head.metrics))}


def _changes(base: Sequence[LayerRecord], head: Sequence[LayerRecord],
             matched: dict[int, tuple[int, str]]) -> tuple[LayerChange, ...]:
    """Changes in head order; a removed layer goes right before the head layer that
    follows it in the base, so the listing reads like a unified diff."""
    out: list[LayerChange] = []
    used_base = {b for b, _ in matched.values()}
    removed = [i for i in range(len(base)) if i not in used_base]
    next_removed = 0
    for h, layer in enumerate(head):
        if h not in matched:
            out.append(LayerChange(ADDED, None, layer.name, layer.op_type, "", _solo(layer, False)))
            continue
        b, how = matched[h]
        while next_removed < len(removed) and removed[next_removed] < b:
            out.append(_removed(base[removed[next_removed]]))
            next_removed += 1
        out.append(_matched(base[b], layer, how))
    out.extend(_removed(base[i]) for i in removed[next_removed:])
    return tuple(out)


def _matched(base: LayerRecord, head: LayerRecord, how: str) -> LayerChange:
    deltas = metric_deltas(base, head)
    known_moved = any(b is not None and h is not None for b, h in deltas.values())
    if known_moved or base.signature != head.signature:
        status = CHANGED
    else:  # unknown vs anything is unknown, never unchanged ('=') or a 0 delta
        status = UNKNOWN if deltas else UNCHANGED
    return LayerChange(status, base.name, head.name, head.op_type, how, deltas)


def _removed(layer: LayerRecord) -> LayerChange:
    return LayerChange(REMOVED, layer.name, None, layer.op_type, "", _solo(layer, True))


def _solo(layer: LayerRecord, is_base: bool) -> dict[str, tuple[Metric, Metric]]:
    """Deltas of a layer present on one side only: from (or to) zero."""
    return {name: ((value, 0) if is_base else (0, value))
            for name, value in sorted(layer.metrics.items()) if value != 0}


def _largest_ratio(change: LayerChange) -> float:
    ratios = [abs(float(h) - float(b)) / abs(float(b)) if b else math.inf
              for b, h in change.deltas.values() if b is not None and h is not None]
    return max(ratios, default=0.0)


def _name(change: LayerChange) -> str:
    return change.head_name if change.head_name is not None else change.base_name or ""
