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

import tempfile
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import replace
from datetime import date
from pathlib import Path

from gate import gitscan
from gate import jobs as engine
from gate.config import ModelGroup, ProjectConfig, resolve_file
from gate.errors import InputError, one_safe_line
from gate.gating import (
    PolicyCache,
    check_scopes,
    make_job,
    on_head_targets,
    read_snapshot_runs,
    refuse_unjudged_groups,
    refuse_unjudged_pairs,
)
from gate.judge import base_by_model, combine_results, judge, utc_today
from gate.records import RunRecord
from gate.result import GateResult, ModelError, UngatedModel
from gate.selection import (
    check_globs,
    is_onnx,
    model_files,
    relative_names,
    ungated_model,
    walk_files,
)
from gate.shards import shard_share

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
    files = gitscan.tracked_files(root, head)
    check_globs(config, files)
    changes = gitscan.changed_models(base_commit, root, config.is_model, head=head)
    ungated = _ungated_changes(config, base_commit, root, head)
    moved = _submodule_errors(root, config, base_commit, head)
    policies = PolicyCache(config, today)
    groups = [(change.path, _group(config, change)) for change in changes]
    refuse_unjudged_groups(groups)
    check_scopes(config, policies, [g for _, g in groups], model_files(config, files))
    refuse_unjudged_pairs(config, policies, [(change.path, group) for change, (_, group)
                                             in zip(changes, groups) if change.head_path])
    if not changes:
        files_read = sorted({resolve_file(config, p) for g in config.groups for p in g.policies})
        head_name = "the staged files" if staged else "HEAD"
        note = (f"No models changed between {base_ref} (merge base {base_commit[:12]}) and "
                f"{head_name}.")
        result = GateResult("check", tuple(files_read), (), notes=() if ungated else (note,),
                            ungated=tuple(ungated))
    else:
        result = _check_changes(root, config, changes, (head, base_commit), baseline, workers,
                                policies, today)
        result = replace(result, ungated=tuple(ungated))
    if moved:  # submodules check cannot look into: errors, never a silent pass
        result = replace(result, errors=(*result.errors, *moved))
    return result, _check_title(result, base_ref, base_commit, staged)


def _check_changes(root: Path, config: ProjectConfig, changes: Sequence[gitscan.ModelChange],
                   revs: tuple[str, str], baseline: str | None, workers: int,
                   policies: PolicyCache, today: date) -> GateResult:
    stored = base_by_model(read_snapshot_runs(baseline)) if baseline else None
    errors: dict[str, list[str]] = {}
    jobs, blobs = _check_jobs(config, changes, revs, stored)
    early: dict[str, GateResult] = {}
    left = Counter(_change_path(key) for key in blobs)  # sides still to come, per change
    by_path = {c.path: c for c in changes}

    def judge_when_complete(key: str, analysed: _Analysed) -> None:
        """Judge a change as soon as all its sides are in, while the workers go on; an
        addition or deletion waits (it may turn out a rename, found by structure)."""
        change = by_path[_change_path(key)]
        left[change.path] -= 1
        if not left[change.path] and change.status not in ("added", "deleted"):
            early[change.path] = _judge_change(change, analysed, stored,
                                               errors.get(change.path, []), policies, today)

    def unreadable(model: str, why: str) -> None:
        errors.setdefault(model, []).append(why)

    with tempfile.TemporaryDirectory(prefix="roofgate-check-") as tmp:
        jobs = _reading_from_git(jobs, blobs, root, Path(tmp))
        try:
            analysed = engine.run_jobs(jobs, workers, done=judge_when_complete, unread=unreadable)
        finally:
            engine.close_blob_readers()
    changes = _pair_by_structure(list(changes), analysed, stored)
    results = [early[change.path] if change.path in early and not change.by_structure else
               _judge_change(change, analysed, stored, errors.get(change.path, []), policies,
                             today) for change in changes]
    return combine_results(results, "check")


def _ungated_changes(config: ProjectConfig, base_commit: str, root: Path,
                     head: str) -> list[UngatedModel]:
    """Changed .onnx files no model group covers (an LFS pointer is named .onnx too)."""
    changes = gitscan.changed_models(
        base_commit, root, lambda p: is_onnx(p) and not config.is_model(p), head=head)
    return [ungated_model(config, c.path, deleted=c.head_path is None) for c in changes]


def _check_title(result: GateResult, base_ref: str, base_commit: str, staged: bool) -> str:
    """The first line: how many .onnx files changed, and how many were gated, not, skipped."""
    counts = result.model_counts
    where = " in the staged files" if staged else ""
    if not counts["seen"]:
        return (f"roofgate check: no models changed since {base_ref} (merge base "
                f"{base_commit[:12]}){where}")
    return (f"roofgate check: {counts['seen']} changed model(s) since {base_ref} (merge base "
            f"{base_commit[:12]}){where}: {counts['gated']} gated, {counts['not_gated']} not "
            f"gated, {counts['skipped']} skipped")


def _pair_by_structure(changes: list[gitscan.ModelChange], analysed: _Analysed,
                       stored: Mapping[str, list[RunRecord]] | None) -> list[gitscan.ModelChange]:
    """Changes with each deletion + addition of the same layer structure made one rename
    (gate/renames.py), so a model renamed and re-exported is compared with its old self."""
    from gate.renames import pair_by_structure

    deleted = {c.path: (stored.get(c.path, []) if stored is not None
                        else analysed.get(_base_key(c.path), ([], ""))[0])
               for c in changes if c.status == "deleted"}
    added = {c.path: analysed.get(c.path, ([], ""))[0] for c in changes if c.status == "added"}
    pairs = pair_by_structure(deleted, added)
    for new, old in pairs.items():
        if old_side := analysed.get(_base_key(old)):
            analysed[_base_key(new)] = ([replace(r, model=new) for r in old_side[0]], old_side[1])
    gone = set(pairs.values())
    return sorted((gitscan.ModelChange("renamed", pairs[c.path], c.path, by_structure=True)
                   if c.path in pairs else c for c in changes if c.path not in gone),
                  key=lambda c: c.path)


def _submodule_errors(root: Path, config: ProjectConfig, base_commit: str,
                      head: str) -> list[ModelError]:
    """One error per moved submodule where the config's model globs reach: check does not
    read inside submodules, so a bump that changes models there must not pass unseen."""
    out = []
    for path, old, new in gitscan.submodule_changes(base_commit, root, head):
        probes = (f"{path}/model.onnx", f"{path}/a/model.onnx", f"{path}/a/b/model.onnx")
        if any(config.is_model(probe) for probe in probes):
            out.append(ModelError(path, (
                f"submodule moved from {old[:12] or '(none)'} to {new[:12] or '(none)'}; check "
                "does not read models inside submodules, so it cannot judge this bump: run "
                "roofgate audit on the submodule's models (both commits), or exclude the "
                "submodule's path in roofgate.yaml")))
    return out


def _judge_change(change: gitscan.ModelChange, analysed: _Analysed,
                  stored: Mapping[str, list[RunRecord]] | None,
                  lfs_errors: list[str], policies: PolicyCache, today: date) -> GateResult:
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
    if "head" in change.links:
        head_err = (f"{change.head_path}: the head side is a symbolic link in git (git stores "
                    "the path it points to, not a model); commit the model file itself")
    errors = [ModelError(change.path, engine.error_text(m, change.path))
              for m in (head_err, *lfs_errors) if m]
    if change.status == "renamed":
        how = (" (git saw a deletion and an addition; their layers match)"
               if change.by_structure else "")
        notes.append(f"{change.base_path} was renamed to {change.head_path}{how}; compared "
                     "with the old file.")
    if "base" in change.links and stored is None:
        base_err = "it is a symbolic link in git, not a model file"
    if base_err:
        notes.append(f"{change.path}: the base side could not be analysed, so the model is "
                     f"judged as new ({base_err})")
    if errors:
        base_runs = []
    group = _group(policies.config, change)
    return judge(head_runs, base_runs, policies.get(group), command="check", today=today,
                 errors=errors, notes=notes, base_from_git=stored is None)


def _base_key(model: str) -> str:
    return f"\0base\0{model}"


def _change_path(key: str) -> str:
    """The change a result key belongs to (a head key is the path itself)."""
    return key.removeprefix("\0base\0")


def _group(config: ProjectConfig, change: gitscan.ModelChange) -> ModelGroup:
    for path in (change.head_path, change.base_path):
        if path is not None:
            group = config.group_for(path)
            if group is not None:
                return group
    raise AssertionError("changed_models only returns configured models")


def _check_jobs(config: ProjectConfig, changes: Sequence[gitscan.ModelChange],
                revs: tuple[str, str], stored: object,
                ) -> tuple[list[engine.Job], dict[str, tuple[str, str, str]]]:
    """Every side's job (a change's sides together) and where its blob is: result key -> (side,
    revision, path). ``revs`` are the (head, base) revisions the blobs are read from;
    nothing is read here (each job reads its blob where it is analysed)."""
    head, base_commit = revs
    jobs: list[engine.Job] = []
    blobs: dict[str, tuple[str, str, str]] = {}
    for change in changes:  # both sides of a change together: it can be judged early
        group = _group(config, change)
        sides = [("head", head, change.head_path, change.path)]
        if stored is None:
            sides.append(("base", base_commit, change.base_path, _base_key(change.path)))
        for side, rev, path, key in sides:
            if path is None or side in change.links:  # a link: nothing to read (_judge_change)
                continue
            blobs[key] = (side, rev, path)
            jobs.append(replace(make_job(config, group, change.path, change.path), key=key))
    return jobs, blobs


def _reading_from_git(jobs: Sequence[engine.Job], blobs: Mapping[str, tuple[str, str, str]],
                      root: Path, tmp: Path) -> list[engine.Job]:
    """Check's jobs, each reading its side's blob from git where it is analysed (bytes
    straight to the parser); a blob too large for memory, or a resolved LFS object,
    goes to its own file in ``tmp``."""
    out = []
    for index, job in enumerate(jobs):
        side, rev, path = blobs[job.result_key]
        spill = tmp / f"{side}-{index:05d}.onnx"
        out.append(replace(job, blob=engine.GitBlob(str(root), rev, path, side, str(spill))))
    return out


# --- audit ---------------------------------------------------------------------------

def find_models(root: Path, config: ProjectConfig, paths: Sequence[str],
                root_files: Sequence[Path] | None = None,
                ) -> tuple[list[str], list[UngatedModel]]:
    """Model files under ``paths`` (default: ``root``, whose walk ``root_files`` may hold
    already) that the config covers, sorted, and the .onnx files there that no group
    covers (a file named on the command line is a model)."""
    found: set[str] = set()
    ungated: dict[str, UngatedModel] = {}
    for given in paths or (str(root),):
        path = Path(given)
        if not path.exists():
            raise InputError("no such file or folder", given)
        if path.is_file():
            files = [path]
        else:
            files = list(root_files) if root_files is not None and not paths \
                else walk_files(path)
        if not path.is_file():
            refuse_links_out((root, path), files)
        real_folders: dict[Path, Path] = {}
        for file in files:
            name = _model_name(root, file, real_folders)
            if config.is_model(name) or (path.is_file() and is_onnx(name)):
                found.add(name)
            elif is_onnx(name):
                ungated[name] = ungated_model(config, name)
    return sorted(found), sorted(ungated.values(), key=lambda u: u.model)


def refuse_links_out(tops: Sequence[Path], files: Sequence[Path]) -> None:
    """InputError for a file met while walking a folder that resolves outside every one of
    ``tops`` (the repository root and the folder the operator named).

    Why: a committed link (to a file or a folder) would make the audit read
    whatever the runner can see outside the repository. A path typed on the
    command line is the operator's choice and is not checked.
    """
    allowed = [top.resolve() for top in tops]
    for file in files:  # a file met without following a link lies where it was met
        if file.is_symlink() and not any(file.resolve().is_relative_to(top)
                                         for top in allowed):
            raise InputError(f"a link leading out of the repository (to {file.resolve()}); "
                             "audit reads only the repository's own files: remove the link, or "
                             "pass the file it points to explicitly", str(file))


def _model_name(root: Path, file: Path, real_folders: dict[Path, Path] | None = None) -> str:
    """``file`` relative to ``root``, both resolved; a link to a file is named by where it
    points, a link to nothing by where it lies. ``real_folders`` caches resolved folders
    across the files of one walk (resolving each file cost a system call per part)."""
    folders = real_folders if real_folders is not None else {}

    def real(folder: Path) -> Path:
        if folder not in folders:
            folders[folder] = folder.resolve()
        return folders[folder]

    resolved = file.resolve() if file.is_symlink() and file.exists() \
        else real(file.parent) / file.name
    try:
        return resolved.relative_to(real(root)).as_posix()
    except ValueError:
        return file.as_posix()


def run_audit(root: Path, config: ProjectConfig, paths: Sequence[str], *, baseline: str | None,
              workers: int, shard: tuple[int, int] | None = None,
              today: date | None = None) -> tuple[GateResult, list[str]]:
    """Audit the zoo (or one shard); returns the raw combined result and the full model list."""
    today = today or utc_today()
    walked = walk_files(root)  # once: the config's globs and (by default) the models
    check_globs(config, relative_names(root, walked))
    present, ungated = find_models(root, config, paths, walked)
    stored = base_by_model(read_snapshot_runs(baseline)) if baseline else {}
    gone = [m for m in stored if m not in present and _in_scope(root, config, paths, m)]
    models = sorted({*present, *gone})
    if not models and not ungated:  # an audit that checks nothing must not read as a pass
        where = ", ".join(one_safe_line(p) for p in paths) or "the repository"
        raise InputError(f"no model to audit under {where}: no .onnx file there (and none "
                         "in the baseline); check the path, or point audit at the models")
    mine = shard_share(models, *shard) if shard else models
    policies = PolicyCache(config, today)
    planned = [(m, _audit_group(config, m)) for m in present]
    refuse_unjudged_groups(planned)
    check_scopes(config, policies, [g for _, g in planned], present)
    refuse_unjudged_pairs(config, policies, planned)
    jobs = [make_job(config, _audit_group(config, m), m, str(root / m))
            for m in mine if m in present]
    judged: dict[str, GateResult] = {}

    def judge_at_once(model: str, analysed: _Analysed) -> None:  # while the workers go on
        judged[model] = _judge_audited(model, True, analysed, stored, policies, config, today)

    analysed = engine.run_jobs(jobs, workers, engine.Progress(label="audit"), done=judge_at_once)
    results = [judged[model] if model in judged else
               _judge_audited(model, model in present, analysed, stored, policies, config, today)
               for model in mine]
    result = replace(combine_results(results, "audit"), ungated=tuple(ungated))
    return result, models


def _judge_audited(model: str, present: bool, analysed: engine.Analysed,
                   stored: Mapping[str, list[RunRecord]], policies: PolicyCache,
                   config: ProjectConfig, today: date) -> GateResult:
    head_runs, error = analysed.get(model, ([], ""))
    errors = [ModelError(model, error)] if error else []
    base_runs = stored.get(model, [])
    notes: list[str] = []
    if present:  # a model gone from the zoo keeps its base runs: all deleted
        base_runs, notes = on_head_targets(base_runs, head_runs)
    return judge(head_runs, [] if error else base_runs,
                 policies.get(_audit_group(config, model)), command="audit", today=today,
                 errors=errors, notes=notes)


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
