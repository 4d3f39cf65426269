"""The one result object every reporter takes: verdicts, diffs and records of a gate run.

A ``GateResult`` is plain data; it round-trips through JSON (``result_to_dict`` /
``result_from_dict``), which is how sharded audits merge and why a reporter can
never need anything that is not in it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from gate import metrics
from gate.errors import EXIT_BAD_INPUT, EXIT_GATE_FAILED, EXIT_PASS
from gate.records import Metric, RunRecord, run_from_dict, run_to_dict

# Verdict / finding statuses.
PASS = "pass"
FAIL = "fail"
WAIVED = "waived"
# Status words of a model x target, worst first: every report uses these (and only these).
WARN = "warn"
REMOVED = "removed"
ENTRY_STATUSES = (FAIL, WARN, PASS, REMOVED)

# Built-in rule ids (no policy file declares them, no waiver covers them).
NOT_GATED = "not-gated"  # a changed .onnx file no model group covers
NOT_COSTED = "not-costed"  # a model none of whose layers could be costed


@dataclass(frozen=True, slots=True)
class Finding:
    """One place a rule looked at and found wanting (or waived): a layer, or the model."""

    layer: str | None  # None for a model-level finding
    metric: str
    value: Metric
    limit: Metric
    message: str  # full sentence: what, value, limit, and the remedy
    status: str  # FAIL or WAIVED
    waiver_reason: str = ""
    waiver_expires: str = ""  # ISO date, "" when not waived
    headline: str = ""  # the message without its remedy ("" in results of format 1)


@dataclass(frozen=True, slots=True)
class Verdict:
    """One rule evaluated on one model x target (one JUnit test case)."""

    rule_id: str
    kind: str
    severity: str  # "error" or "warning"
    description: str
    model: str
    target: str
    status: str  # PASS, FAIL (any unwaived finding) or WAIVED (all findings waived)
    summary: str  # one line for tables and the JUnit message
    remedy: str
    findings: tuple[Finding, ...] = ()

    @property
    def blocks_merge(self) -> bool:
        return self.status == FAIL and self.severity == "error"

    def text_of(self, finding: Finding) -> str:
        """The finding as one sentence without the rule's remedy (reporters say it once):
        its headline, or its message with a trailing ``: <remedy>.`` cut off."""
        if finding.headline:
            return finding.headline
        tail = f": {self.remedy}."
        message = finding.message
        if self.remedy and message.endswith(tail) and len(message) > len(tail):
            return message[: -len(tail)] + "."
        return message

    @property
    def failing(self) -> tuple[Finding, ...]:
        """The unwaived findings, furthest past the limit first (ties keep the rule's order)."""
        return tuple(sorted((f for f in self.findings if f.status == FAIL),
                            key=lambda f: -_excess(f)))


# The remedy of a finding whose figure is unknown (a layer not modelled, a size left unbound):
# the rule's own remedy (speed it up, quantize) would not help; knowing the figure would.
UNKNOWN_REMEDY = "bind the unbound dims (--dim, --shape) or see `roofgate profile` for why"


@dataclass(frozen=True, slots=True)
class LayerChange:
    """A layer matched (or not) between the base and head profile of a model on a target."""

    status: str  # "added", "removed", "changed", "unchanged", "unknown" (gate.diff)
    base_name: str | None
    head_name: str | None
    op_type: str
    matched_by: str  # "name", "signature", or "" for added/removed
    deltas: Mapping[str, tuple[Metric, Metric]]  # metric -> (base, head), changed metrics only


@dataclass(frozen=True, slots=True)
class RunDiff:
    """Base vs head of one model x target: totals and layers."""

    model: str
    target: str
    totals: Mapping[str, tuple[Metric, Metric]]  # every model metric -> (base, head)
    layers: tuple[LayerChange, ...]


@dataclass(frozen=True, slots=True)
class ModelError:
    """A model that could not be analysed: it fails the gate (fail closed)."""

    model: str
    message: str


@dataclass(frozen=True, slots=True)
class UngatedModel:
    """An .onnx file the run found (changed, or in the zoo) that no model group covers.

    ``skipped`` when the config says so on purpose (an ``ungated:`` or ``exclude:``
    glob, or a deletion): it is listed but does not fail. Otherwise it is *not
    gated* and fails the run (rule ``not-gated``), so a glob typo is never silent.
    """

    model: str
    reason: str
    skipped: bool = False


@dataclass(frozen=True, slots=True)
class Entry:
    """Everything about one model x target in this run."""

    model: str
    target: str
    head: RunRecord | None  # None when the model was deleted
    base: RunRecord | None  # None when there is no baseline (new model, or none given)
    diff: RunDiff | None
    verdicts: tuple[Verdict, ...]

    @property
    def status(self) -> str:
        if any(v.blocks_merge for v in self.verdicts):
            return FAIL
        return PASS

    @property
    def rules_applied(self) -> tuple[str, ...]:
        """The ids of the rules that judged this model x target, in verdict order."""
        return tuple(dict.fromkeys(v.rule_id for v in self.verdicts))

    @property
    def ranked_verdicts(self) -> tuple[Verdict, ...]:
        """Verdicts in reading order: blocking failures, warnings, waived, passed (each group
        in policy order)."""
        def rank(v: Verdict) -> int:
            return 0 if v.blocks_merge else 1 if v.status == FAIL else 2 if v.status == WAIVED \
                else 3
        return tuple(sorted(self.verdicts, key=rank))

    @property
    def status_word(self) -> str:
        """``fail`` (a blocking rule failed), ``warn`` (only warnings failed), ``pass``, or
        ``removed`` (the model is gone: nothing to gate)."""
        if self.head is None:
            return REMOVED
        if self.status == FAIL:
            return FAIL
        return WARN if any(v.status == FAIL for v in self.verdicts) else PASS

    @property
    def blocking(self) -> tuple[Blocker, ...]:
        """What blocks the merge here: each unwaived finding of a blocking rule, worst first
        within a rule (a failed rule without findings counts once)."""
        out: list[Blocker] = []
        for verdict in self.verdicts:
            if verdict.blocks_merge:
                out += [Blocker(verdict, f, k) for k, f in enumerate(verdict.failing)] \
                    or [Blocker(verdict, None)]
        return tuple(out)

    @property
    def worst_layer(self) -> str | None:
        """The layer a reader should look at first: the layer of the worst blocking finding,
        else of the worst failing warning, else the layer whose latency changed most
        (absolute), else None."""
        for blocker in self.blocking:
            if blocker.finding is not None and blocker.finding.layer is not None:
                return blocker.finding.layer
        for verdict in self.verdicts:
            layers = [f for f in verdict.failing if f.layer is not None]
            if layers:
                return layers[0].layer
        return self.most_changed_layer

    @property
    def most_changed_layer(self) -> str | None:
        """The head layer whose latency changed most in seconds (impact, not percent)."""
        if self.diff is None:
            return None
        moved = [(metrics.impact("latency_s", *c.deltas["latency_s"]), c.head_name)
                 for c in self.diff.layers
                 if c.head_name is not None and "latency_s" in c.deltas]
        return max(moved, key=lambda pair: pair[0])[1] if moved else None

    @property
    def ridge_flop_per_byte(self) -> float | None:
        """The target's ridge point at the run's precision (FLOP per DRAM byte), or None."""
        run = self.head or self.base
        value = run.target_figures.get("ridge_flop_per_byte") if run else None
        return float(value) if value else None

    @property
    def impact_s(self) -> float:
        """How much the model's latency moved against the base, in seconds (0 without one)."""
        if self.diff is None or "latency_s" not in self.diff.totals:
            return 0.0
        return metrics.impact("latency_s", *self.diff.totals["latency_s"])


@dataclass(frozen=True, slots=True)
class Blocker:
    """One reason the merge is blocked: a blocking rule and one of its unwaived findings."""

    verdict: Verdict
    finding: Finding | None  # None: the rule failed without a finding to point at
    index: int = 0  # position among its rule's findings (the first one carries the remedy)

    @property
    def layer(self) -> str | None:
        return self.finding.layer if self.finding else None

    def sentence(self) -> str:
        """Model, target, rule, layer, value vs limit and (for a rule's first finding) the
        remedy, as one sentence of plain text (each reporter escapes it for its format)."""
        v = self.verdict
        where = f"{v.model} on {v.target}: rule {v.rule_id} fails"
        fix = f" Fix: {v.remedy}." if self.index == 0 and v.remedy else ""
        finding = self.finding
        if finding is None:
            return f"{where}: {v.summary}.{fix}"
        at = f" at layer {finding.layer}" if finding.layer is not None else ""
        if finding.value is None:  # unknown: neither above nor below, and never a pass
            limit = ("the rule" if finding.limit is None else
                     f"the limit of {metrics.fmt(finding.metric, finding.limit)}")
            fix = f" Fix: {UNKNOWN_REMEDY}." if self.index == 0 else ""
            return (f"{where}{at}: {metrics.label(finding.metric)} unknown (?), so {limit} "
                    f"cannot be checked.{fix}")
        relation = "above" if _above(finding) else "below"
        return (f"{where}{at}: {metrics.label(finding.metric)} "
                f"{metrics.fmt(finding.metric, finding.value)}, {relation} the limit of "
                f"{metrics.fmt(finding.metric, finding.limit)}.{fix}")


def blocking_lines(result: GateResult, per_rule: int = 3) -> list[tuple[Entry, str]]:
    """What blocks the merge, as plain sentences every report leads with, each with its
    entry (worst entry first): up to ``per_rule`` findings of each blocking rule (worst
    first, the remedy said with the first), then one line naming the rest of its places."""
    lines: list[tuple[Entry, str]] = []
    for entry in result.ranked_entries:
        by_rule: dict[str, list[Blocker]] = {}
        for blocker in entry.blocking:
            by_rule.setdefault(blocker.verdict.rule_id, []).append(blocker)
        for group in by_rule.values():
            lines += [(entry, b.sentence()) for b in group[:per_rule]]
            rest = group[per_rule:]
            if rest:
                verdict = group[0].verdict
                names = ", ".join(b.layer or "model" for b in rest[:10])
                more = f" and {len(rest) - 10} more" if len(rest) > 10 else ""
                lines.append((entry, (f"{verdict.model} on {verdict.target}: rule "
                                     f"{verdict.rule_id} also fails at {len(rest)} more "
                                     f"place{'s' if len(rest) != 1 else ''}: {names}{more}.")))
    return lines


def blocking_sentences(result: GateResult, per_rule: int = 3) -> list[str]:
    """The sentences of ``blocking_lines`` without their entries, then one per changed model
    that no model group covers (rule ``not-gated``: it blocks the merge like a failed rule)."""
    return ([sentence for _entry, sentence in blocking_lines(result, per_rule)]
            + [not_gated_sentence(item) for item in result.not_gated])


def not_gated_sentence(item: UngatedModel) -> str:
    """Why an ungated model blocks (its reason already says the fix)."""
    return f"{item.model}: rule {NOT_GATED} fails: {item.reason}."


def blocking_rule_count(result: GateResult) -> int:
    """How many rules block the merge: failed blocking rules, plus ``not-gated`` once when
    any changed model is outside every model group."""
    return result.counts.blocking + (1 if result.not_gated else 0)


def _above(finding: Finding) -> bool:
    if finding.value is None or finding.limit is None:
        return True  # an unknown value fails its rule ('cannot be checked')
    return float(finding.value) > float(finding.limit)


def _excess(finding: Finding) -> float:
    """How far past its limit a finding is, in the metric's own unit (0 when unknown)."""
    if finding.value is None or finding.limit is None:
        return 0.0
    excess = abs(float(finding.value) - float(finding.limit))
    return 0.0 if math.isnan(excess) else excess


@dataclass(frozen=True, slots=True)
class RulesSource:
    """Where a ``check`` run took its rules from, and what the pull request changes in them.

    Every report shows ``statement`` at the top and ``changes`` as its own section
    (gate/rules_source.py decides both; reporters only lay them out).
    """

    side: str  # "base" (the merge base's rules judge) or "head" (the pull request's)
    statement: str  # one sentence: where the rules came from, and why
    changes: tuple[str, ...] = ()  # one line per change the pull request makes to the rules

    @property
    def from_head(self) -> bool:
        """The pull request's own rules judge it: every report says so at the top."""
        return self.side == "head"

    @property
    def heading(self) -> str:
        """The title of the changes section, saying when the changes take effect."""
        when = "they judge this run" if self.from_head else "they take effect after merge"
        return f"Rules changed in this pull request ({when})"

    @property
    def loosened(self) -> tuple[str, ...]:
        """The changes that let more through (rules_diff marks them 'loosened')."""
        return tuple(line for line in self.changes if "loosened" in line)


@dataclass(frozen=True, slots=True)
class Counts:
    """Outcome counts of a run (rule results count once per model x target)."""

    entries: int
    failed_entries: int  # model x target pairs with a blocking failure
    blocking: int  # failed error-severity rules
    warnings: int  # failed warning-severity rules
    waived: int  # rules whose every finding is waived
    rules: int  # rule results in all
    errors: int  # models that could not be analysed


@dataclass(frozen=True, slots=True)
class GateResult:
    """One run of the gate (profile, check or audit)."""

    command: str  # "evaluate", "check", "audit", "diff"
    policies: tuple[str, ...]
    entries: tuple[Entry, ...]  # sorted by (model, target)
    errors: tuple[ModelError, ...] = ()
    notes: tuple[str, ...] = ()  # e.g. "no models changed"
    allow_errors: bool = False  # policy explicitly lets unanalysable models through
    ungated: tuple[UngatedModel, ...] = ()  # .onnx files no model group covers, sorted
    rules_source: RulesSource | None = None  # check: where the rules came from, what changed

    @property
    def failed_verdicts(self) -> tuple[Verdict, ...]:
        return tuple(v for e in self.entries for v in e.verdicts if v.status == FAIL)

    @property
    def not_gated(self) -> tuple[UngatedModel, ...]:
        """The ungated files that fail the run (not skipped on purpose)."""
        return tuple(u for u in self.ungated if not u.skipped)

    @property
    def model_counts(self) -> dict[str, int]:
        """How many model files the run saw, gated (judged or unanalysable), not gated
        (failing) and skipped on purpose: the summary line says all four."""
        gated = len({e.model for e in self.entries} | {e.model for e in self.errors})
        not_gated = len(self.not_gated)
        skipped = len(self.ungated) - not_gated
        return {"seen": gated + not_gated + skipped, "gated": gated, "not_gated": not_gated,
                "skipped": skipped}

    @property
    def counts(self) -> Counts:
        verdicts = [v for e in self.entries for v in e.verdicts]
        return Counts(
            entries=len(self.entries),
            failed_entries=sum(1 for e in self.entries if e.status == FAIL),
            blocking=sum(1 for v in verdicts if v.blocks_merge),
            warnings=sum(1 for v in verdicts if v.status == FAIL and not v.blocks_merge),
            waived=sum(1 for v in verdicts if v.status == WAIVED),
            rules=len(verdicts),
            errors=len(self.errors))

    @property
    def blocking(self) -> tuple[Blocker, ...]:
        """Every reason the merge is blocked, in worst-first entry order."""
        return tuple(b for e in self.ranked_entries for b in e.blocking)

    @property
    def ranked_entries(self) -> tuple[Entry, ...]:
        """Entries worst first: fail, warn, pass, removed; then the largest latency change
        (absolute); then model and target. Every report lists entries in this order."""
        order = {status: rank for rank, status in enumerate(ENTRY_STATUSES)}
        return tuple(sorted(self.entries, key=lambda e: (order[e.status_word], -e.impact_s,
                                                         e.model, e.target)))

    @property
    def status_word(self) -> str:
        """``passed``, ``failed`` (a blocking rule) or ``incomplete`` (a model could not be
        analysed and the policy does not allow it): the run's headline word."""
        code = self.exit_code
        if code == EXIT_PASS:
            return "passed"
        return "failed" if code == EXIT_GATE_FAILED else "incomplete"

    @property
    def exit_code(self) -> int:
        """0 pass, 1 an error-severity rule failed or a model was not gated, 2 a model could
        not be analysed."""
        if self.errors and not self.allow_errors:
            return EXIT_BAD_INPUT
        if self.not_gated or any(v.blocks_merge for e in self.entries for v in e.verdicts):
            return EXIT_GATE_FAILED
        return EXIT_PASS


# --- JSON-ready dicts -------------------------------------------------------

def result_to_dict(result: GateResult, share: range | None = None) -> dict[str, Any]:
    """The result as plain data; with ``share``, only the entries of that share (the others
    None: the document of a process writing a share of the JSON report)."""
    entries = [_entry_to_dict(e) for e in result.entries] if share is None else \
        [_entry_to_dict(e) if k in share else None for k, e in enumerate(result.entries)]
    return {
        "command": result.command,
        "policies": list(result.policies),
        "allow_errors": result.allow_errors,
        "notes": list(result.notes),
        "errors": [{"model": e.model, "message": e.message} for e in result.errors],
        "ungated": [{"model": u.model, "reason": u.reason, "skipped": u.skipped}
                    for u in result.ungated],
        "model_counts": result.model_counts,
        "entries": entries,
        **({"rules_source": _rules_to_dict(result.rules_source)} if result.rules_source else {}),
    }


def _rules_to_dict(rules: RulesSource) -> dict[str, Any]:
    return {"side": rules.side, "statement": rules.statement, "heading": rules.heading,
            "changes": list(rules.changes), "loosened": list(rules.loosened)}


def _rules_from_dict(data: Mapping[str, Any] | None) -> RulesSource | None:
    if not data:
        return None
    return RulesSource(str(data["side"]), str(data["statement"]),
                       tuple(str(line) for line in data["changes"]))


def result_from_dict(data: Mapping[str, Any]) -> GateResult:
    return GateResult(
        command=str(data["command"]),
        policies=tuple(str(p) for p in data["policies"]),
        allow_errors=bool(data["allow_errors"]),
        notes=tuple(str(n) for n in data["notes"]),
        errors=tuple(ModelError(str(e["model"]), str(e["message"])) for e in data["errors"]),
        entries=tuple(_entry_from_dict(e) for e in data["entries"]),
        ungated=tuple(UngatedModel(str(u["model"]), str(u["reason"]), bool(u["skipped"]))
                      for u in data.get("ungated", ())),
        rules_source=_rules_from_dict(data.get("rules_source")),
    )


def _entry_to_dict(entry: Entry) -> dict[str, Any]:
    return {
        "model": entry.model,
        "target": entry.target,
        "status": entry.status,
        "rules_applied": list(entry.rules_applied),
        "head": run_to_dict(entry.head) if entry.head else None,
        "base": run_to_dict(entry.base) if entry.base else None,
        "diff": _diff_to_dict(entry.diff) if entry.diff else None,
        "verdicts": [_verdict_to_dict(v) for v in entry.verdicts],
    }


def _entry_from_dict(data: Mapping[str, Any]) -> Entry:
    return Entry(
        model=str(data["model"]),
        target=str(data["target"]),
        head=run_from_dict(data["head"]) if data["head"] else None,
        base=run_from_dict(data["base"]) if data["base"] else None,
        diff=_diff_from_dict(data["diff"]) if data["diff"] else None,
        verdicts=tuple(_verdict_from_dict(v) for v in data["verdicts"]),
    )


def _verdict_to_dict(v: Verdict) -> dict[str, Any]:
    return {
        "rule_id": v.rule_id, "kind": v.kind, "severity": v.severity,
        "description": v.description, "model": v.model, "target": v.target,
        "status": v.status, "summary": v.summary, "remedy": v.remedy,
        "findings": [
            {"layer": f.layer, "metric": f.metric, "value": f.value, "limit": f.limit,
             "message": f.message, "headline": f.headline, "status": f.status,
             "waiver_reason": f.waiver_reason, "waiver_expires": f.waiver_expires}
            for f in v.findings
        ],
    }


def _verdict_from_dict(d: Mapping[str, Any]) -> Verdict:
    return Verdict(
        rule_id=str(d["rule_id"]), kind=str(d["kind"]), severity=str(d["severity"]),
        description=str(d["description"]), model=str(d["model"]), target=str(d["target"]),
        status=str(d["status"]), summary=str(d["summary"]), remedy=str(d["remedy"]),
        findings=tuple(
            Finding(layer=f["layer"], metric=str(f["metric"]), value=f["value"],
                    limit=f["limit"], message=str(f["message"]), status=str(f["status"]),
                    waiver_reason=str(f["waiver_reason"]),
                    waiver_expires=str(f["waiver_expires"]),
                    headline=str(f.get("headline", "")))
            for f in d["findings"]
        ),
    )


def _diff_to_dict(diff: RunDiff) -> dict[str, Any]:
    return {
        "model": diff.model,
        "target": diff.target,
        "totals": {k: list(v) for k, v in sorted(diff.totals.items())},
        "layers": [
            {"status": c.status, "base_name": c.base_name, "head_name": c.head_name,
             "op_type": c.op_type, "matched_by": c.matched_by,
             "deltas": {k: list(v) for k, v in sorted(c.deltas.items())}}
            for c in diff.layers
        ],
    }


def _diff_from_dict(d: Mapping[str, Any]) -> RunDiff:
    return RunDiff(
        model=str(d["model"]),
        target=str(d["target"]),
        totals={k: (v[0], v[1]) for k, v in d["totals"].items()},
        layers=tuple(
            LayerChange(status=str(c["status"]), base_name=c["base_name"],
                        head_name=c["head_name"], op_type=str(c["op_type"]),
                        matched_by=str(c["matched_by"]),
                        deltas={k: (v[0], v[1]) for k, v in c["deltas"].items()})
            for c in d["layers"]
        ),
    )
