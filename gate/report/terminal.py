"""Compact plain-text summary for a terminal or a CI log.

The headline, then what blocks the merge (one sentence per blocking finding:
model, target, rule, layer, value against limit, the remedy once), then one
line per model x target worst first (status, key figures, change vs baseline)
with its warnings and waivers under it, a line per unanalysable model, notes,
and a closing line with the outcome and the exit code. No colour codes,
so logs stay clean; every model-supplied string goes through ``term_safe`` so
a node name cannot move the cursor or fake a line.
"""

from __future__ import annotations

import os
import posixpath
from collections.abc import Sequence
from typing import TextIO

from gate import metrics, units
from gate.errors import EXIT_BAD_INPUT, EXIT_GATE_FAILED, EXIT_PASS
from gate.records import coverage_note, nothing_costed
from gate.report.text import shorten, term_safe
from gate.result import (
    FAIL,
    NOT_GATED,
    WAIVED,
    Entry,
    GateResult,
    Verdict,
    blocking_rule_count,
    blocking_sentences,
)

MAX_FINDINGS_PER_RULE = 3
MAX_BLOCKING_LINES = 20


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
    rules, rules_first = rules_lines(result)
    lines.extend(rules if rules_first else [])
    lines.extend(blocking_lines(result))
    lines.extend([] if rules_first else rules)
    for note in result.notes:
        lines.append(f"  note: {_t(note)}")
    for entry in result.ranked_entries:
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


def rules_lines(result: GateResult) -> tuple[list[str], bool]:
    """Where ``check`` took its rules from, then one line per change the pull request makes
    to them; and whether they lead the summary (the pull request's own rules judge it)
    rather than follow what blocks the merge."""
    source = result.rules_source
    if source is None:
        return [], False
    lines = [f"  rules: {_t(source.statement)}"]
    if source.changes:
        lines += [f"{source.heading}:"] + [f"  - {_t(line)}" for line in source.changes]
    return lines, source.from_head


def reports_line(files: Sequence[str]) -> str:
    """``reports: a.xml`` or, for several files in one folder, ``reports in DIR/: a, b``."""
    folders = {posixpath.dirname(path.replace(os.sep, "/")) for path in files}
    if len(files) > 1 and len(folders) == 1 and "" not in folders:
        names = ", ".join(_t(posixpath.basename(path.replace(os.sep, "/"))) for path in files)
        return f"reports in {_t(folders.pop())}/: {names}"
    return "reports: " + ", ".join(_t(path) for path in files)


def blocking_lines(result: GateResult) -> list[str]:
    """``BLOCKED by ...`` and one numbered sentence per blocking finding (none when clear)."""
    sentences = blocking_sentences(result)
    if not sentences:
        return []
    count = blocking_rule_count(result)
    lines = [f"BLOCKED by {count} rule{'s' if count != 1 else ''}:"]
    for number, sentence in enumerate(sentences[:MAX_BLOCKING_LINES], 1):
        lines.append(f"  {number}. {_t(shorten(sentence, 600))}")
    if len(sentences) > MAX_BLOCKING_LINES:
        lines.append(f"  ... and {len(sentences) - MAX_BLOCKING_LINES} more lines "
                     "(see the JSON report)")
    return lines


def outcome_line(result: GateResult) -> str:
    """``PASSED ... exit 0`` / ``FAILED ... exit 1|2``: the last line a CI log shows."""
    code = result.exit_code
    blocking, warnings = result.counts.blocking, result.counts.warnings
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
    status = entry.status_word.upper()
    lines = [f"  {status:<8} {_t(entry.model)} on {_t(entry.target)}  {_figures(entry)}"]
    if entry.head is not None:
        lines.append(f"           rules: {_t(', '.join(entry.rules_applied)) or 'none'}")
        note = coverage_note(entry.head)
        if note:
            lines.append(f"           coverage: {_t(note.split(': ', 1)[1])}")
    blocked_by = [v.rule_id for v in entry.verdicts if v.blocks_merge]
    if blocked_by:
        lines.append(f"           blocked by {_t(', '.join(blocked_by))} (above)")
    for verdict in entry.ranked_verdicts:
        if verdict.status == FAIL and not verdict.blocks_merge:
            lines.extend(_failed_rule_lines(verdict))
        elif verdict.status == WAIVED:
            lines.append(f"           waived {_t(verdict.rule_id)}: {_t(verdict.summary)}")
    return lines


def _failed_rule_lines(verdict: Verdict) -> list[str]:
    """A warning's summary, its worst findings (value and limit), then its remedy once.

    A single finding that restates the summary (model-level rules) replaces it.
    """
    failing = verdict.failing
    texts = [verdict.text_of(f) for f in failing]
    header = verdict.summary
    if len(texts) == 1 and (not header or header in texts[0]):
        header = texts.pop().removeprefix("Model: ")
    lines = [f"           {verdict.severity} {_t(verdict.rule_id)}: {_t(shorten(header, 300))}"]
    for text in texts[:MAX_FINDINGS_PER_RULE]:
        lines.append(f"             - {_t(shorten(text, 300))}")
    if len(failing) > MAX_FINDINGS_PER_RULE and texts:
        lines.append(f"             ... and {len(failing) - MAX_FINDINGS_PER_RULE} more")
    if verdict.remedy:
        lines.append(f"             fix: {_t(shorten(verdict.remedy, 300))}")
    return lines


def _figures(entry: Entry) -> str:
    record = entry.head
    if record is None:
        return "(no longer present: nothing to gate)"
    if nothing_costed(record):
        return "not costed: no layer could be modelled (see the coverage rule or `profile`)"
    parts = []
    for metric in metrics.KEY_METRICS:
        if metric not in record.metrics:
            continue
        text = f"{metrics.label(metric)} {metrics.fmt(metric, record.metrics[metric])}"
        if entry.diff is not None and metric in entry.diff.totals:
            base, head = entry.diff.totals[metric]
            if not metrics.unchanged(metric, base, head):
                text += f" ({metrics.fmt_signed(metric, base, head)})"
        parts.append(text)
    share = record.metrics.get("coverage_work_share")
    if share is not None and share < 1:
        parts.append(f"only {units.fmt_share(share)} of the work modelled (figures too low)")
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
    for metric in metrics.COST_METRICS:
        if metric in entry.diff.totals:
            word = metrics.direction(metric, *entry.diff.totals[metric])
            if word == units.UNKNOWN:
                return ""  # an unknown cost is neither unchanged nor improved
            if word in ("better", "worse"):
                moved.append(word == "better")
    if not moved:
        return "unchanged"
    return "improved" if all(moved) else ""


def _t(text: str) -> str:
    """One line, terminal-safe: a newline in a name shows as ``\\n``, never breaks the line."""
    return term_safe(text)
