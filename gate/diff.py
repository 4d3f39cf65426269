"""Per-layer diff of two records of the same model on the same target.

Layers are matched in three passes, each on the layers the previous left over:

1. **name**: same node name and op type. Only names that are non-empty and unique
   on both sides count, and the op type must agree, so an exporter that renumbers
   ``node_5`` onto a different op does not pair a Conv with a Relu.
2. **signature**: the remaining layers of both sides, in graph order, are aligned
   as two sequences of ``LayerRecord.signature`` (op type + input/output shapes and
   dtypes) by a longest common subsequence (``align``). An exporter that renames every
   node still yields a diff.
3. **op_type**: inside each stretch the signature pass could not align (the
   layers between two aligned runs), layers are aligned again by op type alone.
   That pairs a layer whose shapes changed (a widened convolution) with its old
   self, reported as changed rather than as one removal plus one addition.

What is left is added (head only) or removed (base only). A matched layer whose
figures are unknown on a side (not modelled) and whose known figures agree is
``unknown``: never ``unchanged``, never a 0 delta. Every step is linear in the
number of layers (dicts built once; the alignment costs O(layers + edits^2)), so a
100k-node model diffs in about the time it takes to read it. Values are compared
with the metric catalogue's change tolerance (``gate.metrics.unchanged``), the
one every report uses, so a baseline read back from a snapshot, whose floats
are rounded, does not show every layer as changed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
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
    if base.metrics == head.metrics and None not in head.metrics.values():
        return {}  # the common case, decided in one C-level comparison
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


def _align(left: Sequence[str], right: Sequence[str]) -> list[Pair]:
    return align(left, right)


MAX_EDITS = 1000  # beyond this many insertions + deletions, align greedily (see ``align``)
GREEDY_WINDOW = 64  # how far ahead the greedy fallback looks for the next equal item


def align(left: Sequence[str], right: Sequence[str]) -> list[Pair]:
    """Index pairs of a longest common subsequence of two sequences, in order.

    The equal prefix and suffix are paired first (linear); the middle is aligned
    with Myers' O((N+M)D) difference algorithm (E. W. Myers, "An O(ND) Difference
    Algorithm and Its Variations", Algorithmica 1986), so a few edits in a huge
    graph cost little. Past ``MAX_EDITS`` edits the two sides have little in
    common and an exact alignment would be quadratic: the middle is then paired
    greedily in order (each left item with the next equal right item within
    ``GREEDY_WINDOW``), still linear and still order-preserving.
    """
    n, m = len(left), len(right)
    start = 0
    while start < n and start < m and left[start] == right[start]:
        start += 1
    end = 0
    while end < n - start and end < m - start and left[n - 1 - end] == right[m - 1 - end]:
        end += 1
    mid_left, mid_right = left[start:n - end], right[start:m - end]
    middle = _myers(mid_left, mid_right, MAX_EDITS)
    if middle is None:
        middle = _greedy(mid_left, mid_right)
    return ([(i, i) for i in range(start)]
            + [(a + start, b + start) for a, b in middle]
            + [(n - end + k, m - end + k) for k in range(end)])


def _myers(a: Sequence[str], b: Sequence[str], max_edits: int) -> list[Pair] | None:
    """The pairs of a shortest edit script of ``a`` into ``b``, or None past ``max_edits``."""
    n, m = len(a), len(b)
    frontier: dict[int, int] = {1: 0}  # diagonal k = x - y -> furthest x reached
    trace: list[dict[int, int]] = []
    for d in range(min(n + m, max_edits) + 1):
        trace.append(dict(frontier))
        for k in range(-d, d + 1, 2):
            if k == -d or (k != d and frontier[k - 1] < frontier[k + 1]):
                x = frontier[k + 1]
            else:
                x = frontier[k - 1] + 1
            y = x - k
            while x < n and y < m and a[x] == b[y]:
                x += 1
                y += 1
            frontier[k] = x
            if x >= n and y >= m:
                return _backtrack(trace, n, m)
    return None


def _backtrack(trace: list[dict[int, int]], n: int, m: int) -> list[Pair]:
    pairs: list[Pair] = []
    x, y = n, m
    for d in range(len(trace) - 1, -1, -1):
        frontier, k = trace[d], x - y
        prev_k = k + 1 if k == -d or (k != d and frontier[k - 1] < frontier[k + 1]) else k - 1
        prev_x = frontier[prev_k]
        prev_y = prev_x - prev_k
        while x > prev_x and y > prev_y:
            x, y = x - 1, y - 1
            pairs.append((x, y))
        x, y = prev_x, prev_y
    pairs.reverse()
    return pairs


def _greedy(a: Sequence[str], b: Sequence[str]) -> list[Pair]:
    pairs: list[Pair] = []
    j = 0
    for i, item in enumerate(a):
        for k in range(j, min(j + GREEDY_WINDOW, len(b))):
            if b[k] == item:
                pairs.append((i, k))
                j = k + 1
                break
    return pairs


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
