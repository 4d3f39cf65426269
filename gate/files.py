"""Model files given by name (``evaluate``, ``baseline``, ``diff``): jobs and results.

Each file takes the settings of the model group of roofgate.yaml that covers it
(or the config's top-level ones), command-line flags replacing them; it is
analysed through ``gate.jobs`` like every other model and judged through
``gate.judge``. ``evaluate`` refuses a model no policy applies to, a policy
scope that matches nothing, and a model x target no rule judged.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import date
from pathlib import Path

from gate import jobs as engine
from gate.config import ModelGroup, ProjectConfig, resolve_target
from gate.errors import InputError
from gate.gating import (
    PolicyCache,
    check_scopes,
    make_job,
    read_snapshot_runs,
    refuse_unjudged_groups,
    refuse_unjudged_pairs,
)
from gate.globs import normalize_path
from gate.judge import base_by_model, combine_results, judge, utc_today, with_notes
from gate.records import RunRecord
from gate.result import GateResult, ModelError
from gate.selection import check_globs, files_under, model_files

NO_TARGET_TEXT = ("give at least one --target (a built-in name, see `roofgate targets`, or a "
                  "target YAML file), or add 'targets:' to roofgate.yaml")


def file_jobs(config: ProjectConfig, models: Sequence[str],
              ) -> list[tuple[engine.Job, ModelGroup]]:
    """One job per model file given by name (each once), with the settings that apply to it.

    A file a model group covers takes that group's targets, dims, shapes and precision;
    any other file takes the config's top-level settings (command-line flags
    already replaced both). InputError when a file ends up with no target;
    ConfigError when a path glob of the config matches no file (a typo would
    silently hand a file the top-level settings).
    """
    if config.source is not None:
        check_globs(config, files_under(Path(config.root)))
    out = []
    for path in dict.fromkeys(models):
        group = config.settings_for(path)
        if not group.targets:
            raise InputError(NO_TARGET_TEXT, path)
        job = make_job(config, group, normalize_path(path), path)
        out.append((job, group))
    return out


def run_files(config: ProjectConfig, models: Sequence[str], *, baseline: str | None,
              today: date | None = None) -> GateResult:
    """Judge model files given by name (``roofgate evaluate``), against a snapshot if given."""
    from gate.policy import unused_waivers

    today = today or utc_today()
    planned = file_jobs(config, models)
    _load_targets_once(planned)
    refuse_unjudged_groups([(job.model, group) for job, group in planned])
    policies = PolicyCache(config, today)
    check_scopes(config, policies, [group for _, group in planned], _known_models(config, planned))
    refuse_unjudged_pairs(config, policies, [(job.model, group) for job, group in planned])
    stored = base_by_model(read_snapshot_runs(baseline)) if baseline else {}
    analysed = engine.run_jobs([job for job, _ in planned], workers=1)
    results = []
    for job, group in planned:
        head_runs, error = analysed[job.result_key]
        wanted = {run.target for run in head_runs}
        base_runs = [r for r in stored.get(job.model, []) if r.target in wanted]
        notes = _baseline_notes(baseline, job.model, head_runs, base_runs)
        results.append(judge(head_runs, base_runs, policies.get(group), command="evaluate",
                             today=today, errors=[ModelError(job.model, error)] if error else [],
                             notes=notes))
    result = combine_results(results, "evaluate")
    verdicts = [v for entry in result.entries for v in entry.verdicts]
    return with_notes(result, unused_waivers(policies.all(), verdicts))


def _known_models(config: ProjectConfig,
                  planned: Sequence[tuple[engine.Job, ModelGroup]]) -> list[str]:
    """The models a policy's ``models:`` scope may name: the given files, and (with a config
    file) every model file of the project, so a rule for another folder is no error."""
    given = [job.model for job, _ in planned]
    if config.source is None:
        return given
    return given + model_files(config, files_under(Path(config.root)))


def _load_targets_once(planned: Sequence[tuple[engine.Job, ModelGroup]]) -> None:
    """Load every target up front: a bad target file is one config error, not one per model."""
    from gate.targets import load_targets

    load_targets(tuple(dict.fromkeys(t for job, _ in planned for t in job.targets)))


def _baseline_notes(baseline: str | None, model: str, head: Sequence[RunRecord],
                    base: Sequence[RunRecord]) -> list[str]:
    if not baseline:
        return ["no baseline given: no diffs, and regression rules compare against nothing"]
    if head and not base:
        return [f"{model}: not in the baseline {baseline}; judged as a new model"]
    return []


def analyse_files(config: ProjectConfig, models: Sequence[str],
                  ) -> tuple[list[RunRecord], list[ModelError], int]:
    """Records of model files given by name (``roofgate baseline``): (runs, errors, targets)."""
    planned = file_jobs(config, models)
    _load_targets_once(planned)
    analysed = engine.run_jobs([job for job, _ in planned], workers=1)
    runs = [run for job, _ in planned for run in analysed[job.result_key][0]]
    errors = [ModelError(job.model, analysed[job.result_key][1]) for job, _ in planned
              if analysed[job.result_key][1]]
    return runs, errors, len({t for job, _ in planned for t in job.targets})


def diff_sides(config: ProjectConfig, old: str, new: str, *,
               explicit_targets: bool) -> GateResult:
    """The unjudged result of ``roofgate diff OLD NEW`` (each a model or a snapshot)."""
    from gate.compare import pair_sides, single_model

    new_runs = _diff_side(config, new, None, explicit_targets)
    old_runs = _diff_side(config, old, single_model(new_runs), explicit_targets)
    old_runs, new_runs, notes = pair_sides(old_runs, new_runs)
    return judge(new_runs, old_runs, (), command="diff", today=utc_today(), notes=notes)


def _diff_side(config: ProjectConfig, path: str, shown: str | None,
               explicit_targets: bool) -> list[RunRecord]:
    from gate.compare import is_snapshot, read_side
    from gate.targets import load_targets

    group = config.defaults if is_snapshot(path) else config.settings_for(path)
    names = group.targets if explicit_targets or not is_snapshot(path) else ()
    targets = load_targets(tuple(dict.fromkeys(resolve_target(config, t) for t in names)))
    return read_side(path, targets, group.dims, group.precision, shown, group.shapes)
