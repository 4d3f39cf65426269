"""Waivers: let a rule fail on named models/layers, with a reason, until an expiry date.

A waiver without ``layers`` covers every finding of the rule on the models it
names (the model-level finding and every layer); with ``layers`` it covers only
findings on matching layers. A waiver holds through its ``expires`` day; from
the next day the finding fails again, saying which waiver expired and why it
was granted. Waivers that matched nothing in a run are reported as notes (not
failures), so stale ones get cleaned up without blocking a merge.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import date, timedelta

from gate.errors import ConfigError
from gate.policy.globs import match_any
from gate.policy.rules import Breach
from gate.policy.spec import Policy, Rule, Waiver
from gate.policy.thresholds import waiver_active
from gate.result import FAIL, WAIVED, Finding, Verdict


def waiver_covers(waiver: Waiver, rule_id: str, model: str, target: str,
                  layer: str | None) -> bool:
    """Whether ``waiver`` applies to a finding of ``rule_id`` on this model/target/layer."""
    if waiver.rule_id != rule_id or not waiver.scope.covers_model(model, target):
        return False
    if not waiver.scope.layers:
        return True
    return layer is not None and match_any(waiver.scope.layers, layer)


def _pick(waivers: list[Waiver], today: date) -> Waiver | None:
    """An active waiver if any covers the finding, else the most recently expired one."""
    active = [w for w in waivers if waiver_active(w.expires.isoformat(), today.isoformat())]
    if active:
        return max(active, key=lambda w: w.expires)
    return max(waivers, key=lambda w: w.expires) if waivers else None


def to_finding(breach: Breach, rule: Rule, waivers: Iterable[Waiver], model: str, target: str,
               today: date) -> Finding:
    """The Finding for one breach: FAIL, WAIVED, or FAIL because its waiver expired."""
    covering = [w for w in waivers if waiver_covers(w, rule.id, model, target, breach.layer)]
    waiver = _pick(covering, today)
    if waiver is None:
        return Finding(breach.layer, breach.metric, breach.value, breach.limit, breach.message,
                       FAIL, headline=breach.headline)
    expires = waiver.expires.isoformat()
    if waiver_active(expires, today.isoformat()):
        return Finding(breach.layer, breach.metric, breach.value, breach.limit, breach.message,
                       WAIVED, waiver.reason, expires, headline=breach.headline)
    where = f"layer '{breach.layer}'" if breach.layer is not None else f"model {model}"
    lapsed = f"The waiver for {rule.id} on {where} expired on {expires}: {waiver.reason}. "
    return Finding(breach.layer, breach.metric, breach.value, breach.limit,
                   lapsed + breach.message, FAIL, waiver.reason, expires,
                   headline=lapsed + breach.headline)


def unused_waivers(policies: Iterable[Policy], verdicts: Iterable[Verdict]) -> tuple[str, ...]:
    """One note per waiver that covered no finding in this run (file:line, rule, what to do)."""
    verdicts = list(verdicts)
    notes = []
    for policy in policies:
        for waiver in policy.waivers:
            if not any(_used(waiver, verdict) for verdict in verdicts):
                notes.append(f"{policy.path}:{waiver.line}: the waiver for {waiver.rule_id} "
                             f"(expires {waiver.expires.isoformat()}) matched no finding in this "
                             "run; remove it if the problem is fixed")
    return tuple(notes)


def _used(waiver: Waiver, verdict: Verdict) -> bool:
    return any(
        finding.waiver_reason == waiver.reason
        and finding.waiver_expires == waiver.expires.isoformat()
        and waiver_covers(waiver, verdict.rule_id, verdict.model, verdict.target, finding.layer)
        for finding in verdict.findings
    )

# --- what every judging run asks of a waiver -------------------------------------------

MIN_REASON_CHARS = 15  # "." or "temp" is no reason; a short sentence is (common practice, no source)
MIN_REASON_WORDS = 3
DEFAULT_HORIZON_DAYS = 90


def waiver_problems(policies: Iterable[Policy], today: date,
                    horizon_days: int = DEFAULT_HORIZON_DAYS) -> list[str]:
    """``file:line: ...`` for each waiver whose reason is too short to say why (and who
    decided), or whose expiry lies more than ``horizon_days`` after ``today``.

    Why: a waiver with ``reason: '.'`` and a far-future expiry turns a rule off
    for good; ``check``, ``evaluate`` and ``audit`` refuse such waivers (exit 2)
    through ``refuse_weak_waivers``.
    """
    out = []
    for policy in policies:
        for waiver in policy.waivers:
            where = f"{policy.path}:{waiver.line}: waiver for {waiver.rule_id}"
            words = waiver.reason.split()
            if len(waiver.reason.strip()) < MIN_REASON_CHARS or len(words) < MIN_REASON_WORDS:
                out.append(f"{where}: the reason {waiver.reason!r} is too short; say why the rule "
                           f"may fail and who decided (at least {MIN_REASON_WORDS} words, "
                           f"{MIN_REASON_CHARS} characters)")
            if waiver.expires > today + timedelta(days=horizon_days):
                out.append(f"{where}: expires {waiver.expires.isoformat()}, more than "
                           f"{horizon_days} days after {today.isoformat()}; set an earlier date "
                           "(or raise waiver_horizon_days in roofgate.yaml)")
    return out


def refuse_weak_waivers(policies: Iterable[Policy], today: date,
                        horizon_days: int = DEFAULT_HORIZON_DAYS) -> None:
    """ConfigError (exit 2) listing every ``waiver_problems`` line, if there is one.

    The one place a run validates waivers: gate/gating.PolicyCache calls it for
    every policy file it loads, so ``check``, ``evaluate`` and ``audit`` agree.
    """
    problems = waiver_problems(policies, today, horizon_days)
    if problems:
        raise ConfigError(problems)
