"""Compact plain-text summary for a terminal or a CI log.

One line per model x target (status, key figures, change vs baseline), the
failed rules under it (first finding each), a line per unanalysable model,
notes, and a closing line with the outcome and the exit code. No colour codes,
so logs stay clean; every model-supplied string goes through ``term_safe`` so
a node name cannot move the cursor or fake a line.
"""

from __future__ import annotations

import math
import os
import posixpath
from collections.abc import Sequence
from typing import TextIO

from gate.diff import same_value
from gate.errors import EXIT_BAD_INPUT, EXIT_GATE_FAILED, EXIT_PASS
from gate.policy.spec import higher_is_better
from gate.records import coverage_note, nothing_costed
from gate.report.text import fmt_change, fmt_metric, fmt_percent, shorten, term_safe
from gate.result import FAIL, NOT_GATED, WAIVED, Entry, Finding, GateResult, Verdict

KEY_METRICS = (("latency_s", "latency"), ("utilization", "util"), ("param_bytes", "params"),
               ("energy_j", "energy"))
# The costs a reader weighs to call a change better or worse (utilization is a means, not a cost).
COST_METRICS = ("latency_s", "param_bytes", "energy_j")
MAX_FINDINGS_PER_RULE = 3


class TerminalReporter:
    name = "terminal"
    help = "Print a compact summary"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(render(result))


REPORTER = TerminalReporter()


def render(result: GateResult, written: Sequence[str] = (), title: str | None = None) -> str:
    """The summary text; ``written`` lists report files to mention at the end.

    ``title`` replaces the default first line (``check`` names the base ref there).
    """
    lines = [_t(title) if title is not None else
             f"roofgate {result.command}: {len(result.entries)} model x target pair(s), "
             f"{len(result.errors)} unanalysable"]
    for note in result.notes:
        lines.append(f"  note: {_t(note)}")
    for entry in result.entries:
        lines.extend(_entry_lines(entry))
    for error in result.errors:
        allowed = " (allowed by policy)" if result.allow_errors else ""
        lines.append(f"  ERROR  {_t(error.model)}: {_t(error.message)}{allowed}")
    for item in result.ungated:
        label = "SKIPPED" if item.skipped else "NOT GATED"
        lines.append(f"  {label:<8} {_t(item.model)}: {_t(item.reason)}")
    lines.append(outcome_line(result))
    files = [path for path in written if path != "-"]
    if files:
        lines.append(reports_line(files))
    return "\n".join(lines) + "\n"


def reports_line(files: Sequence[str]) -> str:
    """``reports: a.xml`` or, for several files in one folder, ``reports in DIR/: a, b``."""
    folders = {posixpath.dirname(path.replace(os.sep, "/")) for path in files}
    if len(files) > 1 and len(folders) == 1 and "" not in folders:
        names = ", ".join(_t(posixpath.basename(path.replace(os.sep, "/"))) for path in files)
        return f"reports in {_t(folders.pop())}/: {names}"
    return "reports: " + ", ".join(_t(path) for path in files)


def outcome_line(result: GateResult) -> str:
    """``PASSED ... exit 0`` / ``FAILED ... exit 1|2``: the last line a CI log shows."""
    code = result.exit_code
    blocking = sum(1 for e in result.entries for v in e.verdicts if v.blocks_merge)
    warnings = sum(1 for e in result.entries for v in e.verdicts
                   if v.status == FAIL and not v.blocks_merge)
    if code == EXIT_PASS:
        extra = f" with {warnings} warning(s)" if warnings else ""
        return f"PASSED{extra} (exit {code})"
    if code == EXIT_GATE_FAILED:
        not_gated = len(result.not_gated)
        parts = ([f"{blocking} blocking rule failure(s)"] if blocking else []) + \
            ([f"{not_gated} changed model(s) not gated ({NOT_GATED})"] if not_gated else [])
        return f"FAILED: {', '.join(parts)} (exit {code})"
    if code == EXIT_BAD_INPUT:
        return f"FAILED: {len(result.errors)} model(s) could not be analysed (exit {code})"
    return f"FAILED (exit {code})"


def _entry_lines(entry: Entry) -> list[str]:
    status = _status(entry)
    lines = [f"  {status:<8} {_t(entry.model)} on {_t(entry.target)}  {_figures(entry)}"]
    if entry.head is not None:
        lines.append(f"           rules: {_t(', '.join(entry.rules_applied)) or 'none'}")
        note = coverage_note(entry.head)
        if note:
            lines.append(f"           coverage: {_t(note.split(': ', 1)[1])}")
    for verdict in entry.verdicts:
        if verdict.status == FAIL:
            lines.extend(_failed_rule_lines(verdict))
        elif verdict.status == WAIVED:
            lines.append(f"           waived {_t(verdict.rule_id)}: {_t(verdict.summary)}")
    return lines


def _failed_rule_lines(verdict: Verdict) -> list[str]:
    """The rule's summary, its worst findings (value and limit), then its remedy once.

    A single finding that restates the summary (model-level rules) replaces it.
    """
    failing = sorted((f for f in verdict.findings if f.status == FAIL), key=_badness,
                     reverse=True)
    messages = [_without_remedy(f.message, verdict.remedy) for f in failing]
    cut = any(stripped for _, stripped in messages)
    header = verdict.summary
    if len(messages) == 1 and verdict.summary and verdict.summary in messages[0][0]:
        header = _model_prefix_off(messages.pop()[0])
    lines = [f"           {verdict.severity} {_t(verdict.rule_id)}: {_t(shorten(header, 300))}"]
    for message, _ in messages[:MAX_FINDINGS_PER_RULE]:
        lines.append(f"             - {_t(shorten(message, 300))}")
    if len(failing) > MAX_FINDINGS_PER_RULE:
        lines.append(f"             ... and {len(failing) - MAX_FINDINGS_PER_RULE} more")
    if cut:
        lines.append(f"             remedy: {_t(shorten(verdict.remedy, 300))}")
    return lines


def _badness(finding: Finding) -> float:
    """How far past its limit a finding is, in the metric's own unit (worst first; ties keep
    the rule's order). Findings of one rule share a metric, so the amounts compare."""
    try:
        value, limit = float(finding.value), float(finding.limit)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return 0.0
    excess = limit - value if higher_is_better(finding.metric) else value - limit
    return 0.0 if math.isnan(excess) else excess  # NaN sorts as 'not past'


def _model_prefix_off(message: str) -> str:
    """A model-level finding's text without its ``Model: `` lead-in (the line names the model)."""
    return message.removeprefix("Model: ")


def _without_remedy(message: str, remedy: str) -> tuple[str, bool]:
    """``message`` without a trailing ``": <remedy>."`` (shown once per rule instead)."""
    tail = f": {remedy}."
    if remedy and message.endswith(tail) and len(message) > len(tail):
        return message[: -len(tail)] + ".", True
    return message, False


def _status(entry: Entry) -> str:
    if entry.head is None:
        return "DELETED"
    if entry.status == FAIL:
        return "FAIL"
    if any(v.status == FAIL for v in entry.verdicts):
        return "WARN"
    return "PASS"


def _figures(entry: Entry) -> str:
    record = entry.head
    if record is None:
        return "(no longer present: nothing to gate)"
    if nothing_costed(record):
        return "not costed: no layer could be modelled (see the coverage rule or `profile`)"
    parts = []
    for metric, label in KEY_METRICS:
        if metric not in record.metrics:
            continue
        text = f"{label} {fmt_metric(metric, record.metrics[metric])}"
        if entry.diff is not None and metric in entry.diff.totals:
            base, head = entry.diff.totals[metric]
            delta = fmt_change(metric, base, head)
            text += "" if delta == "=" else f" ({delta})"
        parts.append(text)
    share = record.metrics.get("coverage_work_share")
    if share is not None and share < 1:
        parts.append(f"only {fmt_percent(share)} of the work modelled (figures too low)")
    if entry.base is None:
        parts.append("new, no baseline")
    elif trend := _trend(entry):
        parts.append(trend)
    return ", ".join(parts)


def _trend(entry: Entry) -> str:
    """``improved`` (no cost metric worse, one better), ``unchanged`` (none moved), or ``""``."""
    if entry.diff is None:
        return ""
    moved = []
    for metric in COST_METRICS:
        if metric in entry.diff.totals and not same_value(*entry.diff.totals[metric]):
            base, head = entry.diff.totals[metric]
            if base is not None and head is not None:
                moved.append((head > base) == higher_is_better(metric))
    if not moved:
        return "unchanged"
    return "improved" if all(moved) else ""


def _t(text: str) -> str:
    """One line, terminal-safe: a newline in a name shows as ``\\n``, never breaks the line."""
    return term_safe(text)
