"""Evaluate a policy on one model x target: one Verdict per rule in scope.

A Verdict FAILs when any finding is unwaived (an expired waiver counts as
none), is WAIVED when every finding is waived, and PASSes otherwise. Rules
scoped away from the model or target yield no Verdict at all; a deleted model
(no head record) yields none either.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import date

from gate import metrics, units
from gate.policy import spec
from gate.policy.regression import allowed_text, check_max_regression
from gate.policy.rules import CHECKS, Outcome, remedy_of
from gate.policy.spec import Policy, Rule
from gate.policy.waivers import to_finding
from gate.records import RunRecord
from gate.result import FAIL, PASS, WAIVED, Finding, RunDiff, Verdict


def evaluate(policy: Policy, head: RunRecord | None, base: RunRecord | None,
             diff: RunDiff | None, *, today: date,
             base_from_git: bool = False) -> tuple[Verdict, ...]:
    """The verdicts of ``policy`` on one model x target; ``today`` decides waiver expiry;
    ``base_from_git`` (``check``) keeps "refresh the baseline" out of remedies."""
    if head is None or not policy.applies_to_target(head.target):
        return ()
    return tuple(
        evaluate_rule(rule, policy, head, base, diff, today=today, base_from_git=base_from_git)
        for rule in policy.rules
        if rule.scope.covers_model(head.model, head.target)
    )


def evaluate_all(policies: Iterable[Policy], head: RunRecord | None, base: RunRecord | None,
                 diff: RunDiff | None, *, today: date,
                 base_from_git: bool = False) -> tuple[Verdict, ...]:
    """The verdicts of several policies on one model x target, in policy then rule order."""
    return tuple(v for policy in policies
                 for v in evaluate(policy, head, base, diff, today=today,
                                   base_from_git=base_from_git))


def allow_unanalysable(policies: Iterable[Policy]) -> bool:
    """Whether a model that cannot be analysed may pass: only if every policy says so."""
    policies = list(policies)
    return bool(policies) and all(p.allow_unanalysable for p in policies)


def evaluate_rule(rule: Rule, policy: Policy, head: RunRecord, base: RunRecord | None,
                  diff: RunDiff | None, *, today: date, base_from_git: bool = False) -> Verdict:
    if rule.kind == spec.MAX_REGRESSION:
        outcome = check_max_regression(rule, head, base, diff, base_from_git=base_from_git)
    else:
        outcome = CHECKS[rule.kind](rule, head, base, diff)
    findings = tuple(to_finding(b, rule, policy.waivers, head.model, head.target, today)
                     for b in outcome.breaches)
    failing = [f for f in findings if f.status == FAIL]
    status = FAIL if failing else (WAIVED if findings else PASS)
    return Verdict(rule_id=rule.id, kind=rule.kind, severity=rule.severity,
                   description=rule.description or describe(rule), model=head.model,
                   target=head.target, status=status, summary=_summary(rule, outcome, findings),
                   remedy=remedy_of(rule, head, base_from_git=base_from_git), findings=findings)


def _summary(rule: Rule, outcome: Outcome, findings: tuple[Finding, ...]) -> str:
    """One line: what passed, or how many places fail and the worst of them."""
    if not findings:
        return outcome.pass_summary
    pairs = list(zip(outcome.breaches, findings))
    failing = [(b, f) for b, f in pairs if f.status == FAIL]
    shown = failing or pairs
    worst = max(shown, key=lambda pair: pair[0].badness)[0]
    if all(b.layer is None for b, _ in pairs):
        text = "; ".join(b.headline.removeprefix("Model: ") for b, _ in shown)
    else:
        count = len({b.layer for b, _ in shown})
        text = (f"{count} layer{'s' if count != 1 else ''} {outcome.fail_phrase}; "
                f"worst: {worst.short}")
    waived = len(pairs) - len(failing)
    if not failing:
        return f"{text} (all waived)"
    expired = sorted({f.waiver_expires for _, f in failing if f.waiver_expires})
    if expired:
        text += f"; waiver expired on {', '.join(expired)}"
    return text + (f"; {waived} more waived" if waived else "")


def describe(rule: Rule) -> str:
    """A one-line description generated from a rule's thresholds (when it has none)."""
    where = "model" if rule.level == spec.MODEL else "each layer's"
    if rule.kind == spec.MIN_UTILIZATION:
        text = (f"{where} {metrics.label('utilization')} at least "
                f"{units.fmt_share(rule.minimum or 0.0)}")
        if rule.level == spec.LAYER:
            text += f" (array layers with at least {metrics.fmt('macs', rule.min_layer_macs)} MACs)"
        return text
    if rule.kind == spec.FITS_IN_BUFFER:
        what = {(True, True): "parameters and activations", (True, False): "parameters",
                (False, True): "activations"}[(rule.check_params, rule.check_activations)]
        return f"each layer's {what} fit the target's on-chip buffers"
    if rule.kind == spec.MAX_UNMODELLED:
        parts = [f"of {m} at most {units.fmt_share(v)}" for m, v in
                 (("work", rule.max_work_share), ("nodes", rule.max_node_share)) if v is not None]
        return "unmodelled share " + " and ".join(parts)
    if rule.kind == spec.MAX_REGRESSION:
        return (f"{where} {metrics.phrase(rule.metric)} no worse than {allowed_text(rule)} "
                "against the baseline")
    metric = {spec.MAX_PARAM_DRAM: "param_dram_bytes", spec.MAX_LATENCY: "latency_s",
              spec.MAX_ENERGY: "energy_j"}.get(rule.kind, rule.metric)
    limits = [f"at least {metrics.fmt(metric, rule.minimum)}" if rule.minimum is not None
              else "", f"at most {metrics.fmt(metric, rule.maximum)}"
              if rule.maximum is not None else ""]
    named = metrics.phrase(metric) if rule.kind == spec.METRIC_LIMIT else \
        metrics.label(metric)
    return f"{where} {named} " + " and ".join(x for x in limits if x)
