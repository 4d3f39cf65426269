"""What every judging run shares: jobs from model groups, policies per group, and the refusals
that keep a run from passing what no rule judged.

* ``PolicyCache`` loads each group's policy files once per run, and refuses
  waivers without a real reason or beyond the config's horizon
  (``gate.policy.waivers.refuse_weak_waivers``; every judging run loads its
  policies here, so the limits hold alike in check, evaluate and audit).
* ``refuse_unjudged_groups`` (before analysing): a model whose group names no
  policy is exit 2 with the remedy, never an "analysed" PASS.
* ``check_scopes`` (before analysing): a policy or rule scope that matches no
  target, model or op type of the run is a configuration error with a "did you
  mean" (``gate.policy.scopes``).
* ``refuse_unjudged_pairs`` (before analysing): a model x target that no rule
  would judge (every policy scoped elsewhere) is exit 2 too.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import replace
from datetime import date
from typing import TYPE_CHECKING

from gate.config import ModelGroup, ProjectConfig, resolve_file, resolve_target
from gate.errors import ConfigError, InputError, RoofgateError
from gate.jobs import Job
from gate.records import RunRecord

if TYPE_CHECKING:  # loaded lazily at run time
    from gate.policy.spec import Policy

NO_POLICY_TEXT = ("no policy applies to this model, so nothing would judge it; pass -p FILE, "
                  "add 'policies:' to roofgate.yaml, or pass -p default for the bundled policy")


class PolicyCache:
    """Policies per model group, each file set loaded (and its waivers checked) once per run.

    ``today`` is the day waiver expiries are judged against (the run's clock).
    """

    def __init__(self, config: ProjectConfig, today: date) -> None:
        self.config = config
        self.today = today
        self._loaded: dict[tuple[str, ...], list[Policy]] = {}

    def get(self, group: ModelGroup) -> list[Policy]:
        if group.policies not in self._loaded:
            from gate.policy.waivers import refuse_weak_waivers

            loaded = _policies(self.config, group)
            refuse_weak_waivers(loaded, self.today, self.config.waiver_horizon_days)
            self._loaded[group.policies] = loaded
        return self._loaded[group.policies]

    def all(self) -> list[Policy]:
        """Every policy loaded so far, each once."""
        unique = {p.path: p for loaded in self._loaded.values() for p in loaded}
        return list(unique.values())


def _policies(config: ProjectConfig, group: ModelGroup) -> list[Policy]:
    from gate.policy.load import load_policies

    return list(load_policies(resolve_file(config, p) for p in group.policies))


def make_job(config: ProjectConfig, group: ModelGroup, model: str, file: str) -> Job:
    """The job analysing ``file`` (named ``model``) with ``group``'s settings."""
    return Job(model=model, file=file,
               targets=tuple(resolve_target(config, t) for t in group.targets),
               dims=tuple(sorted(group.dims.items())), precision=group.precision,
               shapes=tuple(sorted(group.shapes.items())))


def refuse_unjudged_groups(models: Sequence[tuple[str, ModelGroup]]) -> None:
    """InputError (exit 2) naming the first model whose group has no policy file."""
    bare = [model for model, group in models if not group.policies]
    if bare:
        more = f" (and {len(bare) - 1} more models)" if len(bare) > 1 else ""
        raise InputError(f"{NO_POLICY_TEXT}{more}", bare[0])


def check_scopes(config: ProjectConfig, policies: PolicyCache, groups: Iterable[ModelGroup],
                 models: Iterable[str]) -> None:
    """ConfigError listing every policy/rule scope that matches nothing this run could judge."""
    from gate.policy.scopes import scope_problems

    groups = list(groups)
    loaded = list({p.path: p for g in groups for p in policies.get(g)}.values())
    if not loaded:
        return
    names = target_names(config, groups)
    if None in names:  # a target that does not load fails its models on its own, later
        loaded = [replace(p, targets=(), rules=tuple(replace(r, scope=replace(
            r.scope, targets=())) for r in p.rules), waivers=tuple(replace(w, scope=replace(
                w.scope, targets=())) for w in p.waivers)) for p in loaded]
    problems = scope_problems(loaded, targets=[n for n in names if n is not None],
                              models=models)
    if problems:
        raise ConfigError(problems)


def target_names(config: ProjectConfig, groups: Iterable[ModelGroup]) -> list[str | None]:
    """The names of the targets ``groups`` cost on (a target file's name is inside it); None
    for a target that does not load (its models fail with that error when analysed, so the
    reports say why)."""
    from gate.targets import load_target

    names: list[str | None] = []
    for ref in _target_refs(config, groups):
        try:
            names.append(load_target(ref).name)
        except RoofgateError:
            names.append(None)
    return names


def refuse_unjudged_pairs(config: ProjectConfig, policies: PolicyCache,
                          planned: Sequence[tuple[str, ModelGroup]]) -> None:
    """InputError (exit 2) when a model x target would get no verdict from any policy rule
    (every policy or rule is scoped to other targets or models): checked before analysing."""
    names = dict(zip(_target_refs(config, (g for _, g in planned)),
                     target_names(config, [g for _, g in planned])))
    pairs = [(model, group, names[resolve_target(config, ref)]) for model, group in planned
             for ref in group.targets]
    unjudged = [(model, target) for model, group, target in pairs
                if target is not None and not _judged(policies.get(group), model, target)]
    if unjudged:
        model, target = unjudged[0]
        more = f" (and {len(unjudged) - 1} more)" if len(unjudged) > 1 else ""
        raise InputError(f"no policy rule applies on target {target}{more}: every policy or rule "
                         "is scoped to other targets or models; widen a scope, or add a policy "
                         "that covers it (-p FILE, or 'policies:' in roofgate.yaml)", model)


def _judged(policies: Sequence[Policy], model: str, target: str) -> bool:
    return any(policy.applies_to_target(target)
               and any(rule.scope.covers_model(model, target) for rule in policy.rules)
               for policy in policies)


def _target_refs(config: ProjectConfig, groups: Iterable[ModelGroup]) -> list[str]:
    return list(dict.fromkeys(resolve_target(config, t) for g in groups for t in g.targets))


def on_head_targets(base: Sequence[RunRecord], head: Sequence[RunRecord],
                    ) -> tuple[list[RunRecord], list[str]]:
    """Baseline runs on the targets the head is costed on, and a note naming the others.

    A snapshot may hold more targets than this run costs (an older config, or a
    --target override); those runs are no "deleted model", so they are left out.
    When the head could not be analysed there is nothing to match: all are kept.
    """
    if not head:
        return list(base), []
    targets = {run.target for run in head}
    kept = [run for run in base if run.target in targets]
    others = sorted({run.target for run in base} - targets)
    if not others:
        return kept, []
    return kept, [(f"the baseline also holds runs on {', '.join(others)}, which this run does "
                   "not cost; they are left out of the comparison")]


def read_snapshot_runs(path: str) -> list[RunRecord]:
    """The records of a baseline snapshot."""
    from gate.snapshot import read_snapshot

    return list(read_snapshot(path))
