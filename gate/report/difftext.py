"""``roofgate diff`` as text: the model totals, then the most changed layers per model x target."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from gate import metrics
from gate.diff import ranked_changes
from gate.records import coverage_note
from gate.report import terminal
from gate.report.text import shorten, term_safe
from gate.result import GateResult

# Labels come from the metric catalogue (gate/metrics.py), as in every report.
DIFF_TOTALS = ("latency_s", "energy_j", "macs", "param_bytes", "param_dram_bytes", "utilization")
DIFF_LAYER_METRICS = ("latency_s", "macs", "param_bytes", "utilization")


def render_diff(result: GateResult, limit: int, written: Sequence[str] = (),
                sides: tuple[str, str] | None = None) -> str:
    """The diff as text: totals then the most changed layers, per model x target.

    ``sides`` names OLD and NEW as given on the command line, for the first line.
    """
    lines = [f"diff: {term_safe(sides[0])} (old) -> {term_safe(sides[1])} (new)"] if sides else []
    lines += [f"note: {term_safe(n)}" for n in result.notes]
    runs = [run for e in result.entries for run in (e.base, e.head) if run is not None]
    lines += [f"coverage: {term_safe(note)}"
              for note in dict.fromkeys(coverage_note(run) for run in runs) if note]
    for entry in result.entries:
        lines.append(f"{term_safe(entry.model)} on {term_safe(entry.target)}:")
        if entry.diff is None:
            lines.append("  only in " + ("NEW" if entry.base is None else "OLD"))
            continue
        for metric in DIFF_TOTALS:
            if metric in entry.diff.totals:
                base, head = entry.diff.totals[metric]
                lines.append(f"  {metrics.label(metric):<22} {metrics.fmt(metric, base):>12} -> "
                             f"{metrics.fmt(metric, head):>12}  "
                             f"{metrics.fmt_signed(metric, base, head)}")
        ranked = ranked_changes(entry.diff)
        shown = ranked if limit == 0 else ranked[:limit]
        counts = {s: sum(1 for c in entry.diff.layers if c.status == s)
                  for s in ("added", "removed", "changed", "unchanged", "unknown")}
        lines.append("  layers: " + ", ".join(f"{n} {s}" for s, n in counts.items()
                                              if n or s != "unknown"))
        for change in shown:
            lines.append("    " + _change_line(change))
        if len(ranked) > len(shown):
            lines.append(f"    ... {len(ranked) - len(shown)} more (use --limit 0 for all)")
    files = [w for w in written if w != "-"]
    if files:
        lines.append(terminal.reports_line(files))
    return "\n".join(lines) + "\n"


def _change_line(change: Any) -> str:
    name = change.head_name if change.head_name is not None else change.base_name
    label = term_safe(shorten(name or "", 80))
    if change.status == "changed" and change.base_name != change.head_name:
        label += f" (was {term_safe(shorten(change.base_name or '', 60))})"
    named = [(metric, metrics.label(metric)) for metric in DIFF_LAYER_METRICS
             if metric in change.deltas]
    if not named:  # moved only in figures not listed above (e.g. activation bytes): say which
        named = [(metric, metrics.label(metric)) for metric in sorted(change.deltas)[:2]]
    parts = []
    for metric, text in named:
        base, head = change.deltas[metric]
        parts.append(f"{text} {metrics.fmt(metric, base)} -> {metrics.fmt(metric, head)} "
                     f"({metrics.fmt_signed(metric, base, head)})")
    return f"{change.status:<8} {term_safe(change.op_type)} {label}  {'; '.join(parts)}".rstrip()
