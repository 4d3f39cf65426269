"""The two stages every command runs: ``analyse`` a model into records, ``judge`` records.

``analyse`` loads and profiles a model once, then costs that one profile on
every target and flattens each into a ``RunRecord``. ``judge`` pairs head and
base records by (model, target), diffs each pair, evaluates every policy and
returns the ``GateResult`` all reporters format. ``gate``, ``check`` and
``audit`` differ only in where the records come from.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from datetime import date

from gate.costmodel import cost_model
from gate.diff import diff_runs
from gate.errors import InputError
from gate.model.loader import load_model
from gate.policy import allow_unanalysable, evaluate
from gate.policy.spec import Policy
from gate.profile import profile_model
from gate.records import RunRecord
from gate.result import Entry, GateResult, ModelError, Verdict
from gate.summarize import build_run_record
from gate.targets.spec import TargetProfile


def analyse(path: str, targets: Sequence[TargetProfile], *, dims: Mapping[str, int] = {},
            precision: str | None = None, shown_path: str | None = None) -> list[RunRecord]:
    """One record per target for the model at ``path`` (named ``shown_path`` in reports).

    Loads and profiles once for all targets. Load warnings (for example external
    data that was not opened) are kept as record notes so reports show them.
    Raises ``RoofgateError`` subclasses for input that cannot be analysed.
    """
    _refuse_duplicate_targets(targets)
    loaded = load_model(path, dict(dims))
    profile = profile_model(loaded, precision)
    name = shown_path if shown_path is not None else path
    records = []
    for target in targets:
        record = build_run_record(name, profile, cost_model(profile, target), target)
        extra = tuple(w for w in loaded.warnings if w not in record.notes)
        records.append(replace(record, notes=record.notes + extra) if extra else record)
    return records


def judge(head: Sequence[RunRecord], base: Sequence[RunRecord], policies: Sequence[Policy], *,
          command: str, today: date, errors: Sequence[ModelError] = (),
          notes: Sequence[str] = ()) -> GateResult:
    """Pair, diff and evaluate: the one ``GateResult`` of this run.

    A (model, target) in ``head`` only is new (no diff); in ``base`` only, the
    model was removed (no verdicts: rules judge what would be merged). Entries
    are sorted by (model, target), verdicts by policy then rule order, errors
    by model, so the result does not depend on the order records arrived in.
    """
    head_by_key = _index(head, "head")
    base_by_key = _index(base, "base")
    entries = []
    for key in sorted(head_by_key.keys() | base_by_key.keys()):
        head_run, base_run = head_by_key.get(key), base_by_key.get(key)
        diff = diff_runs(base_run, head_run) if head_run and base_run else None
        verdicts = _verdicts(policies, head_run, base_run, diff, today)
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
              diff: object, today: date) -> tuple[Verdict, ...]:
    return tuple(v for policy in policies
                 for v in evaluate(policy, head, base, diff, today=today))  # type: ignore[arg-type]


def _index(runs: Sequence[RunRecord], side: str) -> dict[tuple[str, str], RunRecord]:
    out: dict[tuple[str, str], RunRecord] = {}
    for run in runs:
        if run.key in out:
            raise InputError(f"model {run.model!r} appears twice on target {run.target!r} in the "
                             f"{side} records; give each model once")
        out[run.key] = run
    return out


def _refuse_duplicate_targets(targets: Sequence[TargetProfile]) -> None:
    seen: set[str] = set()
    for target in targets:
        if target.name in seen:
            raise InputError(f"target '{target.name}' is given twice; results are keyed by "
                             "target name, so give each target once")
        seen.add(target.name)
