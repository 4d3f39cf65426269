"""Markdown for a pull-request comment: verdict, summary table, a collapsible section per model.

Layout (top to bottom): the hidden marker ``<!-- roofgate-report -->`` (the
pull-request workflow finds and updates its comment by it), a verdict line, a
red line per model that could not be analysed, run notes, a summary table
(model, target, key metrics, change vs baseline, status), then one
``<details>`` section per model that has something to show (failed rules,
warnings, waivers, the most changed layers, unmodelled ops).

Code hosts cap a comment at 65,536 characters. The report is rendered at
decreasing levels of detail until it fits ``budget`` (``DEFAULT_BUDGET``
leaves room for text a workflow adds around it); rows are ordered most
important first (blocking failures, then warnings, then the largest changes)
and every trimmed table says how many rows it left out.

Every model-supplied string (paths, node names, messages) goes through
``md_escape`` (or ``_summary_text`` inside the HTML ``<summary>``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TextIO

from gate import metrics
from gate.diff import ranked_changes
from gate.records import LayerRecord, RunRecord
from gate.report.text import html_escape, md_escape, shorten
from gate.result import (
    FAIL,
    NOT_GATED,
    WAIVED,
    Entry,
    Finding,
    GateResult,
    LayerChange,
    Verdict,
)

MARKER = "<!-- roofgate-report -->"
COMMENT_LIMIT_CHARS = 65_536
DEFAULT_BUDGET = 60_000
NAME_CHARS = 120  # model-supplied names are shortened to this in tables

# (metric, column title) of the summary table.
SUMMARY_METRICS = (("latency_s", "Latency"), ("utilization", "PE util."),
                   ("param_bytes", "Params"), ("param_dram_bytes", "Param DRAM"),
                   ("energy_j", "Energy"))
DELTA_METRICS = (("latency_s", "Latency"), ("param_bytes", "Params"), ("energy_j", "Energy"))
LAYER_METRICS = (("latency_s", "Latency"), ("macs", "MACs"), ("param_bytes", "Params"),
                 ("utilization", "PE util."))
# A changed layer whose shown columns are all "=" names up to two metrics that did change,
# picked in this order (then by name), in its Change cell.
OTHER_METRICS_FIRST = ("energy_j", "act_dram_bytes", "param_dram_bytes", "input_bytes",
                       "output_bytes", "flops", "cycles", "param_count")

FAIL_MARK, WARN_MARK, PASS_MARK, ERROR_MARK = "\u274c", "\u26a0\ufe0f", "\u2705", "\U0001f6d1"


@dataclass(frozen=True)
class _Limits:
    """How much detail one rendering level shows (None = everything)."""

    summary_rows: int | None
    errors: int | None
    sections: int | None
    findings: int  # rows per findings table
    layers: int  # changed layers per model x target


_LEVELS = (
    _Limits(None, None, None, 30, 10),
    _Limits(None, None, None, 10, 5),
    _Limits(None, 100, 40, 5, 3),
    _Limits(None, 100, 30, 5, 3),
    _Limits(None, 100, 25, 3, 2),
    _Limits(200, 50, 20, 3, 0),
    _Limits(100, 20, 10, 1, 0),
    _Limits(40, 10, 0, 0, 0),
    _Limits(10, 3, 0, 0, 0),
)


@dataclass
class _Render:
    limits: _Limits
    squeezed: bool  # True when detail was cut to fit the comment limit
    left_out: int = 0
    lines: list[str] = field(default_factory=list)

    def trimmed(self, shown: int, total: int, what: str) -> None:
        """Note that ``total - shown`` rows of ``what`` were left out."""
        if total > shown:
            self.left_out += total - shown
            why = " to fit the comment" if self.squeezed else ""
            self.lines.append(f"\n_{total - shown} more {what} left out{why}; "
                              "see the JSON or HTML report._")


class MarkdownReporter:
    name = "markdown"
    help = "Write a markdown summary for a pull-request comment to PATH"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(render(result))


REPORTER = MarkdownReporter()


def render(result: GateResult, budget: int = DEFAULT_BUDGET) -> str:
    """The comment text, at the most detailed level that fits ``budget`` characters."""
    text = ""
    for level, limits in enumerate(_LEVELS):
        text = _render(result, limits, squeezed=level > 0)
        if comment_size(text) <= budget:
            return text
    return _hard_cut(text, budget)


def comment_size(text: str) -> int:
    """Length as code hosts count it (UTF-16 code units: an emoji can count twice)."""
    return len(text.encode("utf-16-le")) // 2


def _render(result: GateResult, limits: _Limits, *, squeezed: bool = False) -> str:
    out = _Render(limits, squeezed)
    out.lines += [MARKER, "", _verdict_line(result), ""]
    out.lines.append("_Analytical estimates from the model graph and target profiles, "
                     "not device measurements._")
    _errors(result, out)
    _ungated(result, out)
    for note in result.notes:
        out.lines.append(f"\n> {md_escape(note)}")
    if result.entries:
        _summary_table(result, out)
        _sections(result, out)
    elif not result.errors:
        out.lines.append("\nNo model x target to gate in this run.")
    if out.left_out and squeezed:
        out.lines.insert(3, f"\n_Trimmed to fit the {COMMENT_LIMIT_CHARS:,}-character comment "
                            f"limit: {out.left_out} rows left out._")
    return "\n".join(out.lines) + "\n"


def _verdict_line(result: GateResult) -> str:
    pairs = len(result.entries)
    blocking = sum(1 for e in result.entries for v in e.verdicts if v.blocks_merge)
    warnings = sum(1 for e in result.entries for v in e.verdicts
                   if v.status == FAIL and not v.blocks_merge)
    parts = [f"{pairs} model x target pair{'s' if pairs != 1 else ''} checked"]
    if blocking:
        parts.append(f"{blocking} blocking rule failure{'s' if blocking != 1 else ''}")
    if warnings:
        parts.append(f"{warnings} warning{'s' if warnings != 1 else ''}")
    if result.errors:
        parts.append(f"{len(result.errors)} model{'s' if len(result.errors) != 1 else ''} "
                     "could not be analysed")
    if result.not_gated:
        count = len(result.not_gated)
        parts.append(f"{count} changed model{'s' if count != 1 else ''} not gated")
    detail = ", ".join(parts)
    if result.errors and not result.allow_errors:
        return f"## {ERROR_MARK} roofgate: could not check every model ({detail})"
    if blocking or result.not_gated:
        return f"## {FAIL_MARK} roofgate: failed ({detail})"
    if not result.entries and not result.errors:
        return f"## {PASS_MARK} roofgate: nothing to check"
    mark = WARN_MARK if warnings or result.errors else PASS_MARK
    return f"## {mark} roofgate: passed ({detail})"


def _errors(result: GateResult, out: _Render) -> None:
    errors = result.errors
    shown = errors if out.limits.errors is None else errors[:out.limits.errors]
    if not errors:
        return
    allowed = " (let through by the policy)" if result.allow_errors else ""
    out.lines.append("")
    for error in shown:
        out.lines.append(f"- {ERROR_MARK} **could not analyse** "
                         f"{md_escape(shorten(error.model, 200))}{allowed}: "
                         f"{md_escape(shorten(error.message, 400))}")
    out.trimmed(len(shown), len(errors), "unanalysable models")


def _ungated(result: GateResult, out: _Render) -> None:
    """Every .onnx file no model group covers: not gated (fails) or skipped on purpose."""
    if not result.ungated:
        return
    out.lines.append("")
    for item in result.ungated:
        mark = "skipped" if item.skipped else f"{FAIL_MARK} **not gated** ({NOT_GATED})"
        out.lines.append(f"- {mark} {md_escape(shorten(item.model, 200))}: "
                         f"{md_escape(shorten(item.reason, 300))}")


def _entry_rank(entry: Entry) -> tuple[int, float, str, str]:
    """Blocking failures first, then warnings, then the largest latency change."""
    if entry.status == FAIL:
        rank = 0
    elif any(v.status == FAIL for v in entry.verdicts):
        rank = 1
    else:
        rank = 2
    change = 0.0
    if entry.diff is not None and "latency_s" in entry.diff.totals:
        base, head = entry.diff.totals["latency_s"]
        change = (abs(float(head) - float(base)) / float(base)
                  if base and head is not None else 0.0)
    return (rank, -change, entry.model, entry.target)


def _status_cell(entry: Entry) -> str:
    if entry.head is None:
        return "removed"
    if entry.status == FAIL:
        return f"{FAIL_MARK} fail"
    if any(v.status == FAIL for v in entry.verdicts):
        return f"{WARN_MARK} warn"
    return f"{PASS_MARK} pass"


def _summary_table(result: GateResult, out: _Render) -> None:
    entries = sorted(result.entries, key=_entry_rank)
    limit = out.limits.summary_rows
    shown = entries if limit is None else entries[:limit]
    titles = ["Model", "Target", *(t for _, t in SUMMARY_METRICS),
              *(f"\u0394 {t}" for _, t in DELTA_METRICS), "Status"]
    out.lines += ["", "| " + " | ".join(titles) + " |", "|" + "---|" * len(titles)]
    for entry in shown:
        out.lines.append("| " + " | ".join(_summary_row(entry)) + " |")
    out.trimmed(len(shown), len(entries), "summary rows")


def _summary_row(entry: Entry) -> list[str]:
    cells = [md_escape(shorten(entry.model, NAME_CHARS)), md_escape(entry.target)]
    record = entry.head
    for metric, _ in SUMMARY_METRICS:
        cells.append(metrics.fmt(metric, record.metrics[metric])
                     if record is not None and metric in record.metrics else "")
    for metric, _ in DELTA_METRICS:
        cells.append(_total_delta(entry, metric))
    cells.append(_status_cell(entry))
    return cells


def _total_delta(entry: Entry, metric: str) -> str:
    if entry.head is None:
        return "removed"
    if entry.base is None or entry.diff is None:
        return "new"
    if metric not in entry.diff.totals:
        return ""
    base, head = entry.diff.totals[metric]
    return metrics.fmt_change(metric, base, head)


# --- per-model sections ---------------------------------------------------------------

def _sections(result: GateResult, out: _Render) -> None:
    by_model: dict[str, list[Entry]] = {}
    for entry in sorted(result.entries, key=_entry_rank):
        if _has_details(entry):
            by_model.setdefault(entry.model, []).append(entry)
    models = list(by_model)
    limit = out.limits.sections
    shown = models if limit is None else models[:limit]
    for model in shown:
        _model_section(model, by_model[model], out)
    out.trimmed(len(shown), len(models), "model sections")


def _has_details(entry: Entry) -> bool:
    return bool(any(v.status != "pass" for v in entry.verdicts)
                or (entry.diff and any(c.status != "unchanged" for c in entry.diff.layers))
                or (entry.head and (entry.head.unmodelled or entry.head.notes)))


def _model_section(model: str, entries: list[Entry], out: _Render) -> None:
    worst = _status_cell(entries[0])
    out.lines += ["", "<details>", (f"<summary>{_summary_text(shorten(model, 200))}: "
                   f"{html_escape(worst)}</summary>")]
    for entry in entries:
        out.lines += ["", f"#### {md_escape(entry.target)}"]
        if entry.head is not None:
            out.lines.append(f"\nRules applied: {md_escape(', '.join(entry.rules_applied))}")
        _notes(entry, out)
        _failed_rules(entry, out)
        _waived_rules(entry, out)
        _changed_layers(entry, out)
    out.lines += ["", "</details>"]


def _summary_text(text: str) -> str:
    """Text for inside ``<summary>``: HTML-escaped, and no @mention."""
    return html_escape(text).replace("@", "@&#8203;")


def _notes(entry: Entry, out: _Render) -> None:
    if entry.head is None:
        out.lines.append("\nThe model was removed in this change.")
        return
    for unmodelled in entry.head.unmodelled:
        out.lines.append(f"\n- not modelled: {unmodelled.count} x "
                         f"{md_escape(unmodelled.op_type)} ({md_escape(unmodelled.reason)}); "
                         "its cost is missing from the totals")
    for note in entry.head.notes:
        out.lines.append(f"\n- {md_escape(note)}")
    if entry.base is None:
        out.lines.append("\nNo baseline for this model on this target: no diff.")


def _failed_rules(entry: Entry, out: _Render) -> None:
    failed = sorted((v for v in entry.verdicts if v.status == FAIL),
                    key=lambda v: (not v.blocks_merge, v.rule_id))
    if not failed:
        return
    rows = [_finding_row(v, f) for v in failed
            for f in (v.findings or (None,)) if f is None or f.status == FAIL]
    limit = out.limits.findings
    out.lines += ["", "**Failed rules**", "",
                  "| Rule | Severity | Where | Metric | Value | Limit | Remedy |",
                  "|---|---|---|---|---|---|---|"]
    out.lines += rows[:max(limit, 1)]
    out.trimmed(min(max(limit, 1), len(rows)), len(rows), "failed-rule rows")


def _finding_row(verdict: Verdict, finding: Finding | None) -> str:
    severity = f"{FAIL_MARK} error" if verdict.severity == "error" else f"{WARN_MARK} warning"
    remedy = md_escape(shorten(verdict.remedy, 300))
    if finding is None:  # a failed rule without findings: show its summary
        return (f"| {md_escape(verdict.rule_id)} | {severity} | model | | | | "
                f"{md_escape(shorten(verdict.summary, 300))}; {remedy} |")
    where = "model" if finding.layer is None else md_escape(shorten(finding.layer, NAME_CHARS))
    if finding.waiver_expires:  # a failing finding with a waiver: the waiver has lapsed
        remedy = (f"waiver expired {md_escape(finding.waiver_expires)} "
                  f"({md_escape(shorten(finding.waiver_reason, 200))}); {remedy}")
    return (f"| {md_escape(verdict.rule_id)} | {severity} | {where} | "
            f"{md_escape(metrics.label(finding.metric))} | "
            f"{metrics.fmt(finding.metric, finding.value)} | "
            f"{metrics.fmt(finding.metric, finding.limit)} | {remedy} |")


def _waived_rules(entry: Entry, out: _Render) -> None:
    rows = [
        f"| {md_escape(v.rule_id)} | "
        f"{'model' if f.layer is None else md_escape(shorten(f.layer, NAME_CHARS))} | "
        f"{md_escape(shorten(f.waiver_reason or 'no reason given', 300))} | "
        f"{md_escape(f.waiver_expires) or 'never'} |"
        for v in entry.verdicts for f in v.findings if f.status == WAIVED
    ]
    if not rows:
        return
    limit = out.limits.findings
    out.lines += ["", "**Waived**", "", "| Rule | Where | Reason | Expires |", "|---|---|---|---|"]
    out.lines += rows[:limit]
    out.trimmed(min(limit, len(rows)), len(rows), "waived rows")


def _changed_layers(entry: Entry, out: _Render) -> None:
    if entry.diff is None:
        return
    ranked = ranked_changes(entry.diff)
    if not ranked:
        out.lines.append("\nNo layer changed against the baseline.")
        return
    limit = out.limits.layers
    titles = ["Layer", "Op (precision)", "Change", *(t for _, t in LAYER_METRICS)]
    out.lines += ["", f"**Most changed layers** ({len(ranked)} changed)"]
    if limit:
        out.lines += ["", "| " + " | ".join(titles) + " |", "|" + "---|" * len(titles)]
        head = {layer.name: layer for layer in entry.head.layers} if entry.head else {}
        out.lines += [_layer_row(change, head.get(change.head_name or ""),
                                 _precision(entry, change)) for change in ranked[:limit]]
    out.trimmed(min(limit, len(ranked)), len(ranked), "changed layers")


def _precision(entry: Entry, change: LayerChange) -> str:
    """The precision the layer was costed at: head's, ``base → head`` when it changed."""
    def of(run: RunRecord | None, name: str | None) -> str:
        layer = run.layer(name) if run is not None and name is not None else None
        return layer.precision if layer is not None else ""
    base, head = of(entry.base, change.base_name), of(entry.head, change.head_name)
    if base and head and base != head:
        return f"{base} → {head}"
    return head or base


def _layer_row(change: LayerChange, head: LayerRecord | None = None, precision: str = "") -> str:
    name = change.head_name if change.head_name is not None else change.base_name or ""
    what = change.status
    if change.status == "changed" and not any(m in change.deltas for m, _ in LAYER_METRICS):
        what += f": {_other_changes(change)}"  # else the row would read all "="
    if change.status != "added" and change.status != "removed" and change.base_name != name:
        what += f" (was {md_escape(shorten(change.base_name or '', NAME_CHARS))})"
    notes = [part for part in (head.fused_label if head else "", precision) if part]
    op = " ".join([change.op_type, *(f"({note})" for note in notes)])
    cells = [md_escape(shorten(name, NAME_CHARS)), md_escape(shorten(op, NAME_CHARS)), what]
    for metric, _ in LAYER_METRICS:
        cells.append(_layer_cell(change, metric))
    return "| " + " | ".join(cells) + " |"


def _other_changes(change: LayerChange, count: int = 2) -> str:
    """'energy -0.8%, input size -37.5%': what changed in a layer outside the table's columns."""
    if not change.deltas:
        return "shapes or types only"
    order = {metric: rank for rank, metric in enumerate(OTHER_METRICS_FIRST)}
    picked = sorted(change.deltas, key=lambda m: (order.get(m, len(order)), m))[:count]
    return ", ".join(f"{metrics.label(m)} {metrics.fmt_signed(m, *change.deltas[m])}" for m in picked)


def _layer_cell(change: LayerChange, metric: str) -> str:
    """``base -> head (+x%)`` for a changed metric; the one side for added/removed layers."""
    if metric not in change.deltas:
        return "0" if change.status in ("added", "removed") else "="
    base, head = change.deltas[metric]
    if change.status == "added":
        return metrics.fmt(metric, head)
    if change.status == "removed":
        return metrics.fmt(metric, base)
    return (f"{metrics.fmt(metric, base)} \u2192 {metrics.fmt(metric, head)} "
            f"({metrics.fmt_signed(metric, base, head)})")


def _hard_cut(text: str, budget: int) -> str:
    """Last resort (only huge single strings get here): cut at a line, say so."""
    tail = "\n\n_Report cut to fit the comment limit; see the JSON or HTML report._\n"
    kept: list[str] = []
    size = comment_size(tail)
    for line in text.splitlines():
        size += comment_size(line) + 1
        if size > budget:
            break
        kept.append(line)
    return "\n".join(kept) + tail


def rendered_sizes(result: GateResult) -> Sequence[int]:
    """Size of every detail level (for tests and for tuning ``_LEVELS``)."""
    return [comment_size(_render(result, limits, squeezed=level > 0))
            for level, limits in enumerate(_LEVELS)]
