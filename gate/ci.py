"""CI glue: from the project config and a repository to jobs and one judged result.

``run_check`` finds the models changed between the merge base of a ref and
HEAD, analyses both sides (each read from git into a temporary file, so the
working tree is never trusted to hold the base) and judges each model on its
own. ``run_audit`` analyses every model of a zoo (or one shard of it) against
an optional previous snapshot. ``run_files`` judges model files given by name.
All three analyse through ``gate.jobs.run_jobs`` and combine per-model results
with ``gate.combine_results``.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import replace
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING

from gate import gitscan
from gate import jobs as engine
from gate.config import ModelGroup, ProjectConfig, resolve_file, resolve_target
from gate.errors import InputError
from gate.globs import normalize_path as normalize_model_path
from gate.judge import base_by_model, combine_results, judge, utc_today, with_notes
from gate.records import RunRecord
from gate.result import GateResult, ModelError
from gate.shards import shard_share

if TYPE_CHECKING:  # loaded lazily at run time (only when a group names policies)
    from gate.policy.spec import Policy

_Analysed = engine.Analysed


def run_check(root: Path, config: ProjectConfig, base_ref: str, *, baseline: str | None,
              workers: int, today: date | None = None, staged: bool = False,
              ) -> tuple[GateResult, str]:
    """Gate the models changed since the merge base of ``base_ref``; (result, title line).

    ``staged``: the head side is the index (what the next commit would hold), as a
    pre-commit hook sees it, instead of the HEAD commit.
    """
    today = today or utc_today()
    head = gitscan.STAGED if staged else "HEAD"
    base_commit = gitscan.merge_base(base_ref, root)
    changes = gitscan.changed_models(base_commit, root, config.is_model, head=head)
    head_name = "the staged files" if staged else "HEAD"
    title = (f"roofgate check: {len(changes)} model(s) changed since {base_ref} "
             f"(merge base {base_commit[:12]})" + (" in the staged files" if staged else ""))
    if not changes:
        note = (f"No models changed between {base_ref} (merge base {base_commit[:12]}) and "
                f"{head_name}.")
        files = sorted({resolve_file(config, p) for g in config.groups for p in g.policies})
        return GateResult("check", tuple(files), (), notes=(note,)), title
    stored = base_by_model(_read_snapshot(baseline)) if baseline else None
    with tempfile.TemporaryDirectory(prefix="roofgate-check-") as tmp:
        jobs, base_jobs, errors = _check_jobs(root, config, changes, (head, base_commit),
                                              stored, tmp)
        analysed = engine.run_jobs([*jobs, *base_jobs], workers)
    policies = _PolicyCache(config)
    results = [_judge_change(change, analysed, stored, errors.get(change.path, []), policies,
                             today) for change in changes]
    return combine_results(results, "check"), title


def _judge_change(change: gitscan.ModelChange, analysed: _Analysed,
                  stored: Mapping[str, list[RunRecord]] | None,
                  lfs_errors: list[str], policies: _PolicyCache, today: date) -> GateResult:
    """Judge one changed model.

    The head side is what the gate judges: a head that cannot be analysed (or
    is an LFS pointer) is an error, and then no base is shown (the model is not
    deleted). A base side that is an LFS pointer is an error too (fetch it); a
    base that merely fails to analyse (say, the PR replaces a broken file) is
    a note, and the model is judged as new.
    """
    head_runs, head_err = analysed.get(change.path, ([], ""))
    base_runs, base_err = analysed.get(_base_key(change.path), ([], ""))
    notes: list[str] = []
    if stored is not None and change.base_path:
        base_runs = [replace(r, model=change.path) for r in stored.get(change.base_path, [])]
        base_runs, skipped = on_head_targets(base_runs, head_runs)
        notes += skipped
    errors = [ModelError(change.path, engine.error_text(m, change.path))
              for m in (head_err, *lfs_errors) if m]
    if change.status == "renamed":
        notes.append(f"{change.base_path} was renamed to {change.head_path}; compared with "
                     "the old file.")
    if base_err:
        notes.append(f"{change.path}: the base side could not be analysed, so the model is "
                     f"judged as new ({base_err})")
    if errors:
        base_runs = []
    group = _group(policies.config, change)
    return judge(head_runs, base_runs, policies.get(group), command="check",
                              today=today, errors=errors, notes=[*notes, *unjudged_notes(group)])


class _PolicyCache:
    """Policies per model group, each file set loaded once per run."""

    def __init__(self, config: ProjectConfig) -> None:
        self.config = config
        self._loaded: dict[tuple[str, ...], list[Policy]] = {}

    def get(self, group: ModelGroup) -> list[Policy]:
        if group.policies not in self._loaded:
            self._loaded[group.policies] = _policies(self.config, group)
        return self._loaded[group.policies]

    def all(self) -> list[Policy]:
        """Every policy loaded so far, each once."""
        unique = {p.path: p for loaded in self._loaded.values() for p in loaded}
        return list(unique.values())


def _base_key(model: str) -> str:
    return f"\0base\0{model}"


def _group(config: ProjectConfig, change: gitscan.ModelChange) -> ModelGroup:
    for path in (change.head_path, change.base_path):
        if path is not None:
            group = config.group_for(path)
            if group is not None:
                return group
    raise AssertionError("changed_models only returns configured models")


def _check_jobs(root: Path, config: ProjectConfig, changes: Sequence[gitscan.ModelChange],
                revs: tuple[str, str], stored: object, tmp: str,
                ) -> tuple[list[engine.Job], list[engine.Job], dict[str, list[str]]]:
    """Write each side's blob to ``tmp`` and make its job; LFS pointers become errors.

    ``revs`` are the (head, base) revisions the blobs are read from.
    """
    head, base_commit = revs
    jobs: list[engine.Job] = []
    base_jobs: list[engine.Job] = []
    errors: dict[str, list[str]] = {}
    for k, change in enumerate(changes):
        group = _group(config, change)
        sides = [("head", head, change.head_path, change.path, jobs)]
        if stored is None:
            sides.append(("base", base_commit, change.base_path, _base_key(change.path), base_jobs))
        for side, rev, path, key, out in sides:
            if path is None:
                continue
            file = os.path.join(tmp, f"{side}-{k:05d}.onnx")
            try:
                real = gitscan.write_blob(rev, path, root, file)
            except InputError as exc:  # e.g. the LFS smudge filter could not download
                errors.setdefault(change.path, []).append(
                    f"cannot read the {side} side from git ({exc.format_message()})")
                continue
            if not real:
                errors.setdefault(change.path, []).append(
                    engine.error_text(gitscan.lfs_error_message(path, side, rev), path))
                continue
            out.append(replace(_job(config, group, change.path, file), key=key))
    return jobs, base_jobs, errors


def _job(config: ProjectConfig, group: ModelGroup, model: str, file: str) -> engine.Job:
    return engine.Job(model=model, file=file,
                      targets=tuple(resolve_target(config, t) for t in group.targets),
                      dims=tuple(sorted(group.dims.items())), precision=group.precision,
                      shapes=tuple(sorted(group.shapes.items())))


def _policies(config: ProjectConfig, group: ModelGroup) -> list[Policy]:
    from gate.policy.load import load_policies

    return list(load_policies(resolve_file(config, p) for p in group.policies))


def _read_snapshot(path: str) -> list[RunRecord]:
    from gate.snapshot import read_snapshot

    return list(read_snapshot(path))


# --- audit ---------------------------------------------------------------------------

def find_models(root: Path, config: ProjectConfig, paths: Sequence[str]) -> list[str]:
    """Model files under ``paths`` (default: ``root``) that the config covers, sorted."""
    found = set()
    for given in paths or (str(root),):
        path = Path(given)
        if not path.exists():
            raise InputError("no such file or folder", given)
        files = [path] if path.is_file() else sorted(
            p for p in path.rglob("*") if p.is_file() and ".git" not in p.parts)
        for file in files:
            name = _model_name(root, file)
            if config.is_model(name) or (path.is_file() and name.endswith(".onnx")):
                found.add(name)
    return sorted(found)


def _model_name(root: Path, file: Path) -> str:
    try:
        return file.resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        return file.as_posix()


def run_audit(root: Path, config: ProjectConfig, paths: Sequence[str], *, baseline: str | None,
              workers: int, shard: tuple[int, int] | None = None,
              today: date | None = None) -> tuple[GateResult, list[str]]:
    """Audit the zoo (or one shard); returns the raw combined result and the full model list."""
    today = today or utc_today()
    present = find_models(root, config, paths)
    stored = base_by_model(_read_snapshot(baseline)) if baseline else {}
    gone = [m for m in stored if m not in present and _in_scope(root, config, paths, m)]
    models = sorted({*present, *gone})
    mine = shard_share(models, *shard) if shard else models
    jobs = [_job(config, _audit_group(config, m), m, str(root / m)) for m in mine if m in present]
    analysed = engine.run_jobs(jobs, workers, engine.Progress(label="audit"))
    policies = _PolicyCache(config)
    results = []
    for model in mine:
        head_runs, error = analysed.get(model, ([], ""))
        errors = [ModelError(model, error)] if error else []
        base_runs = stored.get(model, [])
        notes: list[str] = []
        if model in present:  # a model gone from the zoo keeps its base runs: all deleted
            base_runs, notes = on_head_targets(base_runs, head_runs)
        group = _audit_group(config, model)
        results.append(judge(
            head_runs, [] if error else base_runs, policies.get(group), command="audit",
            today=today, errors=errors, notes=[*notes, *unjudged_notes(group)]))
    return combine_results(results, "audit"), models


# One text for every model without a policy, so per-model notes merge into one line (and
# sharded and unsharded audits give the same notes).
UNJUDGED_NOTE = ("some models fall under no policy: they are analysed but no rule judges them, "
                 "so their PASS means only 'analysed'; add 'policies:' to roofgate.yaml or pass "
                 "--policy")


def unjudged_notes(group: ModelGroup) -> list[str]:
    """``[UNJUDGED_NOTE]`` when ``group`` names no policy file."""
    return [] if group.policies else [UNJUDGED_NOTE]


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


def _audit_group(config: ProjectConfig, model: str) -> ModelGroup:
    group = config.group_for(model)
    if group is not None:
        return group
    return config.groups[0] if config.groups else ModelGroup(("**/*.onnx",), (), ())


def _in_scope(root: Path, config: ProjectConfig, paths: Sequence[str], model: str) -> bool:
    if not config.is_model(model):
        return False
    if not paths:
        return True
    for given in paths:
        prefix = _model_name(root, Path(given))
        if model == prefix or prefix in (".", "") or model.startswith(prefix.rstrip("/") + "/"):
            return True
    return False


# --- model files given by name -----------------------------------------------------

NO_POLICY_TEXT = ("no policy applies to this model, so nothing would judge it; pass -p FILE, "
                  "add 'policies:' to roofgate.yaml, or pass -p default for the bundled policy")
NO_TARGET_TEXT = ("give at least one --target (a built-in name, see `roofgate targets`, or a "
                  "target YAML file), or add 'targets:' to roofgate.yaml")


def file_jobs(config: ProjectConfig, models: Sequence[str], *, need_policy: bool = False,
              ) -> list[tuple[engine.Job, ModelGroup]]:
    """One job per model file given by name (each once), with the settings that apply to it.

    A file a model group covers takes that group's targets, dims, shapes and precision;
    any other file takes the config's top-level settings (command-line flags
    already replaced both). InputError when a file ends up with no target (or,
    when ``need_policy``, no policy: nothing would judge it).
    """
    out = []
    for path in dict.fromkeys(models):
        group = config.settings_for(path)
        if not group.targets:
            raise InputError(NO_TARGET_TEXT, path)
        if need_policy and not group.policies:
            raise InputError(NO_POLICY_TEXT, path)
        job = _job(config, group, normalize_model_path(path), path)
        out.append((job, group))
    return out


def run_files(config: ProjectConfig, models: Sequence[str], *, baseline: str | None,
              today: date | None = None) -> GateResult:
    """Judge model files given by name (``roofgate evaluate``), against a snapshot if given."""
    from gate.policy import unused_waivers

    today = today or utc_today()
    planned = file_jobs(config, models, need_policy=True)
    _load_targets_once(planned)
    stored = base_by_model(_read_snapshot(baseline)) if baseline else {}
    analysed = engine.run_jobs([job for job, _ in planned], workers=1)
    policies = _PolicyCache(config)
    results = []
    for job, group in planned:
        head_runs, error = analysed[job.result_key]
        wanted = {run.target for run in head_runs}
        base_runs = [r for r in stored.get(job.model, []) if r.target in wanted]
        notes = _baseline_notes(baseline, job.model, head_runs, base_runs)
        results.append(judge(head_runs, base_runs, policies.get(group), command="evaluate",
                             today=today, errors=[ModelError(job.model, error)] if error else [],
                             notes=[*notes, *unjudged_notes(group)]))
    result = combine_results(results, "evaluate")
    verdicts = [v for entry in result.entries for v in entry.verdicts]
    return with_notes(result, unused_waivers(policies.all(), verdicts))


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
