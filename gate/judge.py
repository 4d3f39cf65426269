"""From records to the one ``GateResult``: pair head and base, diff, evaluate policies, combine.

``judge`` pairs head and base records by (model, target), diffs each pair,
evaluates every policy and returns the ``GateResult`` all reporters format.
Every command judges one model at a time (with that model's policies) and
combines the per-model results with ``combine_results``, which is
order-independent: ``-j 1``, ``-j 8`` and a sharded audit merged with
``roofgate merge`` give the same result, and so byte-identical reports.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import replace
from datetime import date, datetime, timezone

from gate.diff import diff_runs
from gate.errors import InputError
from gate.policy import allow_unanalysable, evaluate
from gate.policy.spec import Policy
from gate.records import RunRecord, nothing_costed
from gate.result import FAIL, NOT_COSTED, Entry, Finding, GateResult, ModelError, Verdict


def utc_today() -> date:
    """Today's date in UTC (waiver expiry is judged against it)."""
    return datetime.now(timezone.utc).date()


def judge(head: Sequence[RunRecord], base: Sequence[RunRecord], policies: Sequence[Policy], *,
          command: str, today: date, errors: Sequence[ModelError] = (),
          notes: Sequence[str] = (), base_from_git: bool = False) -> GateResult:
    """Pair, diff and evaluate: the ``GateResult`` of these records.

    A (model, target) in ``head`` only is new (no diff); in ``base`` only, the
    model was removed (no verdicts: rules judge what would be merged). Entries
    are sorted by (model, target), verdicts by policy then rule order, errors
    by model, so the result does not depend on the order records arrived in.
    ``base_from_git`` (``check`` without a snapshot) keeps "refresh the baseline" out of
    the remedies: the merge itself refreshes a base read from git.
    """
    head_by_key = _index(head, "head")
    base_by_key = _index(base, "base")
    entries = []
    for key in sorted(head_by_key.keys() | base_by_key.keys()):
        head_run, base_run = head_by_key.get(key), base_by_key.get(key)
        diff = diff_runs(base_run, head_run) if head_run and base_run else None
        verdicts = _verdicts(policies, head_run, base_run, diff, today, base_from_git)
        entries.append(Entry(model=key[0], target=key[1], head=head_run, base=base_run,
                             diff=diff, verdicts=verdicts))
    return GateResult(
        command=command,
        policies=tuple(p.path for p in policies),
        entries=tuple(entries),
        errors=tuple(sorted(errors, key=lambda e: (e.model, e.message))),
        notes=tuple(dict.fromkeys(notes)),
        allow_errors=allow_unanalysable(policies),
    )


def _verdicts(policies: Sequence[Policy], head: RunRecord | None, base: RunRecord | None,
              diff: object, today: date, base_from_git: bool) -> tuple[Verdict, ...]:
    """Verdicts of every policy, then the built-in ones; ``check`` reads its base from git
    (no baseline snapshot to refresh, which the remedies then do not suggest)."""
    judged = tuple(v for policy in policies
                   for v in evaluate(policy, head, base, diff, today=today,  # type: ignore[arg-type]
                                     base_from_git=base_from_git))
    return judged + builtin_verdicts(head)


BUILTIN_KIND = "builtin"  # the kind of verdicts no policy file declares


def builtin_verdicts(head: RunRecord | None) -> tuple[Verdict, ...]:
    """Rules no policy can switch off or waive: a model none of whose layers could be costed
    fails (``not-costed``); its latency, energy and traffic are unknown, never zero."""
    if head is None or not nothing_costed(head):
        return ()
    unbound = any("unbound" in note for note in head.notes)
    remedy = ("bind the symbolic input dims (--dim NAME=N or --shape INPUT=SHAPE, or dims: / "
              "shapes: in roofgate.yaml)" if unbound
              else "see `roofgate profile` for why each layer is unmodelled")
    summary = (f"none of the model's work could be costed ({int(head.metrics.get('unmodelled_nodes') or 0)}"
               f" of {int(head.metrics.get('layers') or 0)} layers unmodelled): latency, energy and "
               "traffic are unknown")
    finding = Finding(None, "unmodelled_nodes", head.metrics.get("unmodelled_nodes", 0), 0,
                      f"Model: {summary}: {remedy}.", FAIL)
    return (Verdict(rule_id=NOT_COSTED, kind=BUILTIN_KIND, severity="error",
                    description="at least one layer of the model can be costed",
                    model=head.model, target=head.target, status=FAIL, summary=summary,
                    remedy=remedy, findings=(finding,)),)


def _index(runs: Sequence[RunRecord], side: str) -> dict[tuple[str, str], RunRecord]:
    out: dict[tuple[str, str], RunRecord] = {}
    for run in runs:
        if run.key in out:
            raise InputError(f"model {run.model!r} appears twice on target {run.target!r} in the "
                             f"{side} records; give each model once")
        out[run.key] = run
    return out


def combine_results(results: Iterable[GateResult], command: str) -> GateResult:
    """One GateResult from many; order-independent, so shards merge like an unsharded run."""
    results = list(results)
    errors = tuple(sorted({(e.model, e.message) for r in results for e in r.errors}))
    erroring = [r for r in results if r.errors]
    return GateResult(
        command=command,
        policies=tuple(sorted({p for r in results for p in r.policies})),
        entries=tuple(sorted((e for r in results for e in r.entries),
                             key=lambda e: (e.model, e.target))),
        errors=tuple(ModelError(m, msg) for m, msg in errors),
        notes=tuple(sorted({n for r in results for n in r.notes})),
        allow_errors=bool(erroring) and all(r.allow_errors for r in erroring),
        ungated=tuple(sorted({u for r in results for u in r.ungated},
                             key=lambda u: (u.model, u.reason, u.skipped))),
    )


def with_notes(result: GateResult, notes: Sequence[str]) -> GateResult:
    """``result`` with ``notes`` placed before its own (each note once)."""
    if not notes:
        return result
    return replace(result, notes=tuple(dict.fromkeys((*notes, *result.notes))))


def base_by_model(runs: Iterable[RunRecord]) -> Mapping[str, list[RunRecord]]:
    """Group baseline records by model path."""
    out: dict[str, list[RunRecord]] = {}
    for run in runs:
        out.setdefault(run.model, []).append(run)
    return out
