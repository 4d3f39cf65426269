"""Which layers the HTML report's layer table lists: the ones that matter, and a count of the rest.

A 200k-node model would otherwise write a 200k-row table (tens of MB). The table
lists every layer a failing rule names, every added, removed or changed layer
(up to ``MAX_CHANGED_LAYERS``, largest latency change first), and the
``MAX_SLOWEST_LAYERS`` slowest; the rest are counted in one line that points to
the JSON report, which keeps every layer. Rows keep the order of the graph (or
of the diff), so a reader sees the layers in the model's order.

Selection is a formatting decision (how much of the result to lay out), never a
verdict: the failing layers come from the result's findings, "changed" from its
diff, and ranks from ``gate.diff.ranked_changes`` and the records' latencies.
"""

from __future__ import annotations

import heapq
from collections.abc import Callable, Collection, Sequence
from dataclasses import dataclass

from gate.diff import ranked_changes
from gate.records import LayerRecord
from gate.report.charts import known
from gate.result import LayerChange, RunDiff

MAX_SLOWEST_LAYERS = 50
MAX_CHANGED_LAYERS = 200
MAX_FLAGGED_LAYERS = 200


@dataclass(frozen=True, slots=True)
class Picked:
    """The positions (in the graph's or the diff's order) the table lists, and what it
    leaves out: layers that did not change (or, without a base, all other layers) and
    changed layers beyond the cap."""

    positions: tuple[int, ...]
    rest_unchanged: int
    rest_changed: int = 0

    @property
    def rest(self) -> int:
        return self.rest_unchanged + self.rest_changed


def pick_layers(layers: Sequence[LayerRecord], flagged: Collection[str],
                slowest: int = MAX_SLOWEST_LAYERS) -> Picked:
    """Layers of one run without a base: the flagged ones and the slowest."""
    chosen = set(_slowest(range(len(layers)), lambda k: layers[k], slowest))
    chosen |= set(_flagged(range(len(layers)), lambda k: layers[k].name, flagged))
    return Picked(tuple(sorted(chosen)), len(layers) - len(chosen))


def pick_changes(diff: RunDiff, head: Sequence[LayerRecord], flagged: Collection[str],
                 slowest: int = MAX_SLOWEST_LAYERS,
                 max_changed: int = MAX_CHANGED_LAYERS) -> Picked:
    """Layer pairs of a diff: flagged, changed (largest change first, capped) and slowest."""
    changes = diff.layers
    position = {id(change): k for k, change in enumerate(changes)}
    moved = ranked_changes(diff)
    chosen = {position[id(change)] for change in moved[:max_changed]}
    by_name = {layer.name: layer for layer in head}

    def head_layer(k: int) -> LayerRecord | None:
        name = changes[k].head_name
        return by_name.get(name) if name is not None else None

    chosen |= set(_slowest(range(len(changes)), head_layer, slowest))
    chosen |= set(_flagged(range(len(changes)), lambda k: _name(changes[k]), flagged))
    rest_changed = sum(1 for change in moved if position[id(change)] not in chosen)
    rest_unchanged = len(changes) - len(chosen) - rest_changed
    return Picked(tuple(sorted(chosen)), rest_unchanged, rest_changed)


def _slowest(positions: range, layer_at: Callable[[int], LayerRecord | None],
             count: int) -> list[int]:
    """The ``count`` positions with the largest known latency (an unknown one never ranks)."""
    timed = []
    for k in positions:
        layer = layer_at(k)
        latency = known(layer.metrics, "latency_s") if layer is not None else None
        if latency is not None:
            timed.append((latency, -k))
    return [-neg for _latency, neg in heapq.nlargest(count, timed)]


def _flagged(positions: range, name_at: Callable[[int], str],
             flagged: Collection[str]) -> list[int]:
    if not flagged:
        return []
    out = [k for k in positions if name_at(k) in flagged]
    return out[:MAX_FLAGGED_LAYERS]


def _name(change: LayerChange) -> str:
    return change.head_name if change.head_name is not None else change.base_name or ""


def rest_line(picked: Picked, *, with_base: bool) -> str:
    """``and 199,870 more layers, unchanged; full detail in the JSON report`` (plain text)."""
    if not picked.rest:
        return ""
    parts = []
    if picked.rest_changed:
        parts.append(f"{picked.rest_changed:,} more changed layer"
                     f"{'s' if picked.rest_changed != 1 else ''} with a smaller latency change")
    if picked.rest_unchanged:
        what = "unchanged" if with_base else "none named by a rule, none among the slowest"
        more = "more " if not parts else ""
        parts.append(f"{picked.rest_unchanged:,} {more}layer"
                     f"{'s' if picked.rest_unchanged != 1 else ''}, {what}")
    return f"And {' and '.join(parts)}; full detail in the JSON report."
