"""The nightly trend: which models got better or worse than the previous snapshot."""

from __future__ import annotations

from gate.records import RunRecord
from gate.result import GateResult

TREND_MIN_CHANGE = 0.01  # a total moving less than 1% is "unchanged"
TREND_MAX_LINES = 20


def trend_notes(result: GateResult) -> list[str]:
    """Which models got better or worse than the previous snapshot (latency and energy)."""
    worse, better, same = [], [], 0
    for entry in result.entries:
        if entry.head is None or entry.base is None:
            continue
        moves = _moves(entry.base, entry.head)
        if any(change > TREND_MIN_CHANGE for _, change in moves):
            worse.append(_trend_line(entry.model, entry.target, moves))
        elif any(change < -TREND_MIN_CHANGE for _, change in moves):
            better.append(_trend_line(entry.model, entry.target, moves))
        else:
            same += 1
    if not (worse or better or same):
        return []
    lines = [(f"Trend vs the previous snapshot: {len(worse)} worse, {len(better)} better, "
              f"{same} unchanged (latency or energy moved by more than "
              f"{TREND_MIN_CHANGE:.0%}).")]
    for label, items in (("worse", worse), ("better", better)):
        lines += [f"{label}: {item}" for item in items[:TREND_MAX_LINES]]
        if len(items) > TREND_MAX_LINES:
            lines.append(f"{label}: ... and {len(items) - TREND_MAX_LINES} more")
    return lines


def _moves(base: RunRecord, head: RunRecord) -> list[tuple[str, float]]:
    out = []
    for metric in ("latency_s", "energy_j"):
        old, new = base.metrics.get(metric), head.metrics.get(metric)
        if old is not None and new is not None and old > 0:  # unknown: no trend to tell
            out.append((metric, (float(new) - float(old)) / float(old)))
    return out


def _trend_line(model: str, target: str, moves: list[tuple[str, float]]) -> str:
    parts = ", ".join(f"{metric.removesuffix('_s').removesuffix('_j')} {change:+.1%}"
                      for metric, change in moves if abs(change) > TREND_MIN_CHANGE)
    return f"{model} on {target}: {parts}"
