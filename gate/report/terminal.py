"""Compact plain-text summary for a terminal or a CI log.

One line per model x target (status, key figures, change vs baseline), the
failed rules under it (first finding each), a line per unanalysable model,
notes, and a closing line with the outcome and the exit code. No colour codes,
so logs stay clean; every model-supplied string goes through ``term_safe`` so
a node name cannot move the cursor or fake a line.
"""

from __future__ import annotations

from typing import Sequence, TextIO

from gate.errors import EXIT_BAD_INPUT, EXIT_GATE_FAILED, EXIT_PASS
from gate.report.text import fmt_change, fmt_metric, shorten, term_safe
from gate.result import FAIL, WAIVED, Entry, GateResult

KEY_METRICS = (("latency_s", "latency"), ("utilization", "util"), ("param_bytes", "params"),
               ("energy_j", "energy"))
MAX_FINDINGS_PER_RULE = 3


class TerminalReporter:
    name = "terminal"
    help = "Print a compact summary"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(render(result))


REPORTER = TerminalReporter()


def render(result: GateResult, written: Sequence[str] = ()) -> str:
    """The summary text; ``written`` lists report files to mention at the end."""
    lines = [f"roofgate {result.command}: {len(result.entries)} model x target pair(s), "
             f"{len(result.errors)} unanalysable"]
    for note in result.notes:
        lines.append(f"  note: {_t(note)}")
    for entry in result.entries:
        lines.extend(_entry_lines(entry))
    for error in result.errors:
        allowed = " (allowed by policy)" if result.allow_errors else ""
        lines.append(f"  ERROR  {_t(error.model)}: {_t(error.message)}{allowed}")
    lines.append(outcome_line(result))
    files = [_t(path) for path in written if path != "-"]
    if files:
        lines.append("reports: " + ", ".join(files))
    return "\n".join(lines) + "\n"


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
        return f"FAILED: {blocking} blocking rule failure(s) (exit {code})"
    if code == EXIT_BAD_INPUT:
        return f"FAILED: {len(result.errors)} model(s) could not be analysed (exit {code})"
    return f"FAILED (exit {code})"


def _entry_lines(entry: Entry) -> list[str]:
    status = _status(entry)
    lines = [f"  {status:<8} {_t(entry.model)} on {_t(entry.target)}  {_figures(entry)}"]
    for verdict in entry.verdicts:
        if verdict.status == FAIL:
            lines.append(f"           {verdict.severity} {_t(verdict.rule_id)}: "
                         f"{_t(verdict.summary)}")
            failing = [f for f in verdict.findings if f.status == FAIL]
            for finding in failing[:MAX_FINDINGS_PER_RULE]:
                lines.append(f"             - {_t(shorten(finding.message, 300))}")
            if len(failing) > MAX_FINDINGS_PER_RULE:
                lines.append(f"             ... and {len(failing) - MAX_FINDINGS_PER_RULE} more")
        elif verdict.status == WAIVED:
            lines.append(f"           waived {_t(verdict.rule_id)}: {_t(verdict.summary)}")
    return lines


def _status(entry: Entry) -> str:
    if entry.head is None:
        return "REMOVED"
    if entry.status == FAIL:
        return "FAIL"
    if any(v.status == FAIL for v in entry.verdicts):
        return "WARN"
    return "PASS"


def _figures(entry: Entry) -> str:
    record = entry.head
    if record is None:
        return ""
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
    if entry.base is None:
        parts.append("new, no baseline")
    return ", ".join(parts)


def _t(text: str) -> str:
    """One line, terminal-safe: a newline in a name shows as ``\\n``, never breaks the line."""
    return term_safe(text)
