"""Markdown for a pull-request comment: what blocks the merge first, then one block per model.

Layout (roofgate's own), top to bottom:

1. the hidden marker ``<!-- roofgate-report -->`` (the pull-request workflow finds
   and updates its comment by it) and a plain-words headline: ``merge blocked``,
   ``clear to merge`` or ``incomplete``;
2. **Blocking**: one numbered sentence per blocking finding (model, target, rule,
   layer, value against the limit; the remedy once per rule), then warnings in
   one line, unanalysable models, notes and a line of counts;
3. a six-column overview, worst first: status, model, target, latency, the
   latency change against the base in words, the worst layer;
4. a block per model x target that failed or warned, always open: its totals
   against the base, its rule results (blocking first) and its largest layer
   changes (ranked by the absolute latency change);
5. the blocks of passing and removed models folded into one ``<details>``.

Code hosts cap a comment at 65,536 characters. The report is rendered at
decreasing levels of detail until it fits ``budget`` (``DEFAULT_BUDGET`` leaves
room for text a workflow adds around it); the blocking sentences come first and
stay longest, and every trimmed part says how much it left out.

Every model-supplied string goes through ``md_escape``; the ``<summary>`` of the
folded part holds no model-supplied text.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TextIO

from gate import metrics
from gate.diff import ranked_changes
from gate.records import LayerRecord, RunRecord
from gate.report.text import md_escape, shorten
from gate.result import (
    FAIL,
    NOT_GATED,
    PASS,
    REMOVED,
    WAIVED,
    WARN,
    Entry,
    Finding,
    GateResult,
    LayerChange,
    Verdict,
    blocking_rule_count,
    blocking_sentences,
)

MARKER = "<!-- roofgate-report -->"
COMMENT_LIMIT_CHARS = 65_536
DEFAULT_BUDGET = 60_000
NAME_CHARS = 120  # model-supplied names are shortened to this in tables

HEADLINES = {"passed": "clear to merge", "failed": "merge blocked",
             "incomplete": "incomplete: a model could not be analysed"}
# How a model x target's status reads in the overview (strong when it needs attention).
STATUS_CELLS = {FAIL: "**fail**", WARN: "**warn**", PASS: "pass", REMOVED: "removed"}
OUTCOME_CELLS = {"block": "blocks merge", "warn": "warning", WAIVED: "waived", PASS: "passed"}
# The figures of a block's totals line, in this order.
TOTALS = metrics.KEY_METRICS


@dataclass(frozen=True)
class _Limits:
    """How much detail one rendering level shows (None = everything)."""

    blocking: int | None  # blocking sentences
    summary_rows: int | None
    errors: int | None
    blocks: int | None  # open blocks of failing or warning entries
    folded: int | None  # folded blocks of passing entries
    findings: int  # rule-result rows per block
    layers: int  # changed layers per block


_LEVELS = (
    _Limits(None, None, None, None, None, 30, 8),
    _Limits(None, None, None, None, 40, 10, 5),
    _Limits(None, None, 100, 40, 10, 5, 3),
    _Limits(60, None, 100, 25, 0, 5, 2),
    _Limits(40, 200, 50, 15, 0, 3, 0),
    _Limits(30, 100, 20, 8, 0, 1, 0),
    _Limits(20, 40, 10, 0, 0, 0, 0),
    _Limits(10, 10, 3, 0, 0, 0, 0),
)


@dataclass
class _Shared:
    """What every detail level shows alike, worked out once per ``render`` rather than once
    per level (a large result is rendered at several levels before one fits): the entries
    worst first, the blocking sentences, and each overview row and block already rendered."""

    ranked: tuple[Entry, ...]
    sentences: list[str]
    rows: dict[int, str] = field(default_factory=dict)  # id(entry) -> overview row
    # (id(entry), findings, layers, squeezed) -> the block's lines and rows it left out
    blocks: dict[tuple[int, int, int, bool], tuple[list[str], int]] = \
        field(default_factory=dict)

    @classmethod
    def of(cls, result: GateResult) -> _Shared:
        return cls(result.ranked_entries, blocking_sentences(result))


@dataclass
class _Render:
    limits: _Limits
    squeezed: bool  # True when detail was cut to fit the comment limit
    shared: _Shared
    left_out: int = 0
    lines: list[str] = field(default_factory=list)

    def trimmed(self, shown: int, total: int, what: str) -> None:
        """Note that ``total - shown`` of ``what`` were left out."""
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
    shared = _Shared.of(result)
    for level, limits in enumerate(_LEVELS):
        text = _render(result, limits, shared, squeezed=level > 0)
        if comment_size(text) <= budget:
            return text
    return _hard_cut(text, budget)


def comment_size(text: str) -> int:
    """Length as code hosts count it (UTF-16 code units: an emoji can count twice)."""
    return len(text.encode("utf-16-le")) // 2


def _render(result: GateResult, limits: _Limits, shared: _Shared, *,
            squeezed: bool = False) -> str:
    out = _Render(limits, squeezed, shared)
    out.lines += [MARKER, "", _headline(result)]
    rules, rules_first = rules_lines(result)
    out.lines += rules if rules_first else []
    _blocking(result, out)
    _warnings_line(result, out)
    _errors(result, out)
    _ungated(result, out)
    out.lines += [] if rules_first else rules
    for note in result.notes:
        out.lines.append(f"\n> {md_escape(note)}")
    out.lines.append(f"\n_{_counts_line(result)} Analytical estimates from the model graph "
                     "and target profiles, not device measurements._")
    if result.entries:
        _overview(result, out)
        _blocks(result, out)
    elif not result.errors:
        out.lines.append("\nNo model x target to gate in this run.")
    if out.left_out and squeezed:
        out.lines.insert(3, f"\n_Trimmed to fit the {COMMENT_LIMIT_CHARS:,}-character comment "
                            f"limit: {out.left_out} rows left out._")
    return "\n".join(out.lines) + "\n"


def _headline(result: GateResult) -> str:
    if not result.entries and not result.errors:
        return f"## roofgate {md_escape(result.command)}: nothing to check"
    return f"## roofgate {md_escape(result.command)}: {HEADLINES[result.status_word]}"


def _blocking(result: GateResult, out: _Render) -> None:
    sentences = out.shared.sentences
    if not sentences:
        return
    count = blocking_rule_count(result)
    limit = out.limits.blocking
    shown = sentences if limit is None else sentences[:limit]
    out.lines += ["", f"**Blocking: {count} rule{'s' if count != 1 else ''}**", ""]
    out.lines += [f"{k}. {md_escape(shorten(s, 700))}" for k, s in enumerate(shown, 1)]
    out.trimmed(len(shown), len(sentences), "blocking lines")


def _warnings_line(result: GateResult, out: _Render) -> None:
    warned = [v for e in out.shared.ranked for v in e.verdicts
              if v.status == FAIL and not v.blocks_merge]
    if not warned:
        return
    names = "; ".join(f"{md_escape(v.rule_id)} on {md_escape(shorten(v.model, NAME_CHARS))} "
                      f"({md_escape(v.target)})" for v in warned[:5])
    more = f"; and {len(warned) - 5} more" if len(warned) > 5 else ""
    out.lines.append(f"\n**Warnings** (do not block): {names}{more}.")


def _counts_line(result: GateResult) -> str:
    c = result.counts
    pairs = f"{c.entries} model x target pair{'s' if c.entries != 1 else ''} checked"
    parts = [pairs, f"{c.blocking} blocking", f"{c.warnings} warning{'s' if c.warnings != 1 else ''}",
             f"{c.waived} waived"]
    if c.errors:
        parts.append(f"{c.errors} not analysed")
    return " \u00b7 ".join(parts) + "."


def _errors(result: GateResult, out: _Render) -> None:
    errors = result.errors
    if not errors:
        return
    shown = errors if out.limits.errors is None else errors[:out.limits.errors]
    allowed = " (let through by the policy)" if result.allow_errors else ""
    out.lines.append("")
    for error in shown:
        out.lines.append(f"- **could not analyse** {md_escape(shorten(error.model, 200))}"
                         f"{allowed}: {md_escape(shorten(error.message, 400))}")
    out.trimmed(len(shown), len(errors), "unanalysable models")


def _ungated(result: GateResult, out: _Render) -> None:
    """Every .onnx file no model group covers: not gated (fails the run) or skipped on
    purpose."""
    if not result.ungated:
        return
    out.lines.append("")
    for item in result.ungated:
        mark = "skipped" if item.skipped else f"**not gated** ({NOT_GATED})"
        out.lines.append(f"- {mark}: {md_escape(shorten(item.model, 200))}: "
                         f"{md_escape(shorten(item.reason, 300))}")


# --- overview ---------------------------------------------------------------------------

def _overview(result: GateResult, out: _Render) -> None:
    entries = out.shared.ranked
    limit = out.limits.summary_rows
    shown = entries if limit is None else entries[:limit]
    out.lines += ["", "| Status | Model | Target | Latency | Latency against base | Worst layer |",
                  "|---|---|---|---|---|---|"]
    rows = out.shared.rows
    for entry in shown:
        row = rows.get(id(entry))
        if row is None:
            row = rows[id(entry)] = "| " + " | ".join(_overview_row(entry)) + " |"
        out.lines.append(row)
    out.trimmed(len(shown), len(entries), "overview rows")


def _overview_row(entry: Entry) -> list[str]:
    record = entry.head
    latency = metrics.fmt("latency_s", record.metrics.get("latency_s")) if record else ""
    worst = entry.worst_layer
    return [STATUS_CELLS[entry.status_word], md_escape(shorten(entry.model, NAME_CHARS)),
            md_escape(entry.target), latency, _total_change(entry, "latency_s"),
            md_escape(shorten(worst, NAME_CHARS)) if worst else ""]


def _total_change(entry: Entry, metric: str) -> str:
    if entry.head is None:
        return "model removed"
    if entry.base is None or entry.diff is None:
        return "new, no base"
    if metric not in entry.diff.totals:
        return ""
    return metrics.fmt_change(metric, *entry.diff.totals[metric])


# --- per model x target blocks ------------------------------------------------------------

def _blocks(result: GateResult, out: _Render) -> None:
    entries = [e for e in out.shared.ranked if _has_details(e)]
    open_ = [e for e in entries if e.status_word in (FAIL, WARN)]
    folded = [e for e in entries if e.status_word not in (FAIL, WARN)]
    limit = out.limits.blocks
    shown = open_ if limit is None else open_[:limit]
    for entry in shown:
        _block(entry, out)
    out.trimmed(len(shown), len(open_), "failing or warning models")
    limit = out.limits.folded
    shown = folded if limit is None else folded[:limit]
    if shown:
        count = len(folded)
        out.lines += ["", "<details>", (f"<summary>{count} passing or removed model x target "
                      f"pair{'s' if count != 1 else ''}: totals, rules and layer changes"
                      "</summary>")]
        for entry in shown:
            _block(entry, out)
        out.lines += ["", "</details>"]
    out.trimmed(len(shown), len(folded), "passing models")


def _has_details(entry: Entry) -> bool:
    return bool(any(v.status != PASS for v in entry.verdicts)
                or (entry.diff and any(c.status != "unchanged" for c in entry.diff.layers))
                or (entry.head and (entry.head.unmodelled or entry.head.notes))
                or entry.head is None)


def _block(entry: Entry, out: _Render) -> None:
    """The entry's block, rendered once per detail it depends on (then reused)."""
    key = (id(entry), out.limits.findings, out.limits.layers, out.squeezed)
    done = out.shared.blocks.get(key)
    if done is None:
        block = _Render(out.limits, out.squeezed, out.shared)
        block.lines += ["", (f"### {entry.status_word} \u00b7 "
                             f"{md_escape(shorten(entry.model, 200))} on {md_escape(entry.target)}")]
        _notes(entry, block)
        _totals(entry, block)
        _rule_results(entry, block)
        _layer_changes(entry, block)
        done = out.shared.blocks[key] = (block.lines, block.left_out)
    out.lines += done[0]
    out.left_out += done[1]


def _notes(entry: Entry, out: _Render) -> None:
    if entry.head is None:
        out.lines.append("\nThe model was removed in this change: nothing to gate.")
        return
    for unmodelled in entry.head.unmodelled:
        out.lines.append(f"\n- not modelled: {unmodelled.count} x "
                         f"{md_escape(unmodelled.op_type)} ({md_escape(unmodelled.reason)}); "
                         "its cost is missing from the totals")
    for note in entry.head.notes:
        out.lines.append(f"\n- {md_escape(note)}")


def _totals(entry: Entry, out: _Render) -> None:
    record = entry.head
    if record is None:
        return
    parts = []
    for metric in TOTALS:
        if metric not in record.metrics:
            continue
        text = f"{metrics.label(metric)} {metrics.fmt(metric, record.metrics[metric])}"
        if entry.diff is not None and metric in entry.diff.totals:
            text += f", {metrics.fmt_change(metric, *entry.diff.totals[metric])}"
        parts.append(text)
    against = "against the base" if entry.base is not None else "(new: no base to compare)"
    out.lines.append(f"\nTotals {against}: " + " \u00b7 ".join(parts) + ".")


def _rule_results(entry: Entry, out: _Render) -> None:
    rows: list[str] = []
    fixes: list[str] = []
    for verdict in entry.ranked_verdicts:
        if verdict.status == PASS:
            continue
        outcome = _outcome(verdict)
        findings: Sequence[Finding | None] = (
            verdict.failing if verdict.status == FAIL else verdict.findings) or (None,)
        rows += [_rule_row(verdict, outcome, f) for f in findings]
        if verdict.status == FAIL and not verdict.blocks_merge and verdict.remedy:
            fixes.append(f"Fix for {md_escape(verdict.rule_id)}: "
                         f"{md_escape(shorten(verdict.remedy, 300))}.")
    passed = sum(1 for v in entry.verdicts if v.status == PASS)
    applied = ", ".join(md_escape(rule) for rule in entry.rules_applied) or "none"
    out.lines.append(f"\nRules applied: {applied}.")
    if not rows:
        if passed:
            out.lines.append(f"\nAll {passed} rule{'s' if passed != 1 else ''} passed.")
        return
    limit = max(out.limits.findings, 1)
    out.lines += ["", "| Rule | Outcome | Where | Found | Limit |", "|---|---|---|---|---|"]
    out.lines += rows[:limit]
    out.trimmed(min(limit, len(rows)), len(rows), "rule-result rows")
    if passed:
        out.lines.append(f"\n{passed} more rule{'s' if passed != 1 else ''} passed.")
    out.lines += [f"\n{fix}" for fix in fixes]


def _outcome(verdict: Verdict) -> str:
    if verdict.blocks_merge:
        return OUTCOME_CELLS["block"]
    return OUTCOME_CELLS["warn"] if verdict.status == FAIL else OUTCOME_CELLS[verdict.status]


def _rule_row(verdict: Verdict, outcome: str, finding: Finding | None) -> str:
    rule = md_escape(verdict.rule_id)
    if finding is None:  # a rule that failed or was waived without findings: its summary
        return f"| {rule} | {outcome} | model | {md_escape(shorten(verdict.summary, 300))} | |"
    where = "model" if finding.layer is None else md_escape(shorten(finding.layer, NAME_CHARS))
    if finding.status == WAIVED or finding.waiver_expires:
        state = "until" if finding.status == WAIVED else "waiver expired"
        outcome += (f" ({state} {md_escape(finding.waiver_expires or 'no date')}: "
                    f"{md_escape(shorten(finding.waiver_reason or 'no reason given', 200))})")
    found = f"{metrics.label(finding.metric)} {metrics.fmt(finding.metric, finding.value)}"
    return (f"| {rule} | {outcome} | {where} | {md_escape(found)} | "
            f"{metrics.fmt(finding.metric, finding.limit)} |")


def _layer_changes(entry: Entry, out: _Render) -> None:
    if entry.diff is None:
        return
    ranked = ranked_changes(entry.diff)
    if not ranked:
        out.lines.append("\nNo layer changed against the base.")
        return
    limit = out.limits.layers
    out.lines.append(f"\nLayers with the largest latency change ({len(ranked)} changed):")
    if limit:
        out.lines += ["", "| Layer | Op | Latency | Change | Other changes |",
                      "|---|---|---|---|---|"]
        head = {layer.name: layer for layer in entry.head.layers} if entry.head else {}
        out.lines += [_layer_row(change, head.get(change.head_name or ""),
                                 _precision(entry, change)) for change in ranked[:limit]]
    out.trimmed(min(limit, len(ranked)), len(ranked), "changed layers")
    unchanged = len(entry.diff.layers) - len(ranked)
    if unchanged:
        out.lines.append(f"\n_And {unchanged:,} more layer{'s' if unchanged != 1 else ''} "
                         "unchanged; full detail in the JSON report._")


def _precision(entry: Entry, change: LayerChange) -> str:
    """The precision the layer was costed at: head's, ``base -> head`` when it changed."""
    def of(run: RunRecord | None, name: str | None) -> str:
        layer = run.layer(name) if run is not None and name is not None else None
        return layer.precision if layer is not None else ""
    base, head = of(entry.base, change.base_name), of(entry.head, change.head_name)
    if base and head and base != head:
        return f"{base} \u2192 {head}"
    return head or base


def _layer_row(change: LayerChange, head_layer: LayerRecord | None = None,
               precision: str = "") -> str:
    """One changed layer; the op cell names the fused group the head layer runs in."""
    name = change.head_name if change.head_name is not None else change.base_name or ""
    label = md_escape(shorten(name, NAME_CHARS))
    if change.status == "changed" and change.base_name != name:
        label += f" (was {md_escape(shorten(change.base_name or '', NAME_CHARS))})"
    base, head = change.deltas.get("latency_s", (None, None))
    if change.status == "added":
        latency, what = f"\u2014 \u2192 {metrics.fmt('latency_s', head)}", "added"
    elif change.status == "removed":
        latency, what = f"{metrics.fmt('latency_s', base)} \u2192 \u2014", "removed"
    elif "latency_s" not in change.deltas:
        latency, what = "unchanged", "unchanged"
    else:
        latency = f"{metrics.fmt('latency_s', base)} \u2192 {metrics.fmt('latency_s', head)}"
        what = metrics.fmt_change("latency_s", base, head)
    fused = head_layer.fused_label if head_layer is not None else ""
    notes = [part for part in (fused, precision) if part]
    op = change.op_type + "".join(f" ({part})" for part in notes)
    return (f"| {label} | {md_escape(shorten(op, NAME_CHARS))} | {latency} | {what} | "
            f"{_other_changes(change)} |")


# A changed layer's other figures, the most telling first (then by name), at most two.
OTHER_METRICS_FIRST = ("macs", "param_bytes", "utilization", "energy_j", "act_dram_bytes",
                       "param_dram_bytes", "input_bytes", "output_bytes", "flops", "cycles")


def _other_changes(change: LayerChange, count: int = 2) -> str:
    """'MACs up by 24.9 M (+300%); parameter size worse by 3.79 MiB (+300%)'."""
    if change.status in ("added", "removed"):
        return ""
    deltas = {m: v for m, v in change.deltas.items() if m != "latency_s"}
    if not deltas:
        return "" if "latency_s" in change.deltas else "shapes or types only"
    order = {metric: rank for rank, metric in enumerate(OTHER_METRICS_FIRST)}
    picked = sorted(deltas, key=lambda m: (order.get(m, len(order)), m))[:count]
    return "; ".join(f"{metrics.label(m)} {metrics.fmt_change(m, *deltas[m])}" for m in picked)


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
    shared = _Shared.of(result)
    return [comment_size(_render(result, limits, shared, squeezed=level > 0))
            for level, limits in enumerate(_LEVELS)]


# --- where check took its rules from, and what the pull request changes in them --------

MAX_RULE_CHANGE_LINES = 40  # a pull request rewriting every policy still fits the comment


def rules_lines(result: GateResult) -> tuple[list[str], bool]:
    """Where ``check`` took its rules from, then the rules section (a heading and one bullet
    per change, the rest counted); and whether they lead the comment (the pull request's
    own rules judge it, said as a warning) rather than follow what blocks the merge."""
    source = result.rules_source
    if source is None:
        return [], False
    mark = "**Warning: the pull request's own rules judge it.** " if source.from_head else ""
    lines = [f"\n> {mark}{md_escape(source.statement)}"]
    if source.changes:
        shown = source.changes[:MAX_RULE_CHANGE_LINES]
        lines += ["", f"#### {md_escape(source.heading)}", ""]
        lines += [f"- {md_escape(shorten(line, 400))}" for line in shown]
        if len(source.changes) > len(shown):
            lines.append(f"- ... and {len(source.changes) - len(shown)} more (see the JSON "
                         "report)")
    return lines, source.from_head
