"""Which model files a run gates, and the ones it does not: nothing is skipped in silence.

An ``.onnx`` file (an LFS pointer to one included: it is named ``.onnx`` too)
that no model group of ``roofgate.yaml`` covers is *not gated* and fails the
run, unless an ``ungated:`` (or ``exclude:``) glob names it on purpose. A path
glob of the config that matches no file at all is a configuration error: it is
almost always a typo (``model/`` for ``models/``) that would switch the gate
off for a whole folder.
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Iterable, Sequence
from pathlib import Path

from gate.config import ProjectConfig
from gate.errors import ConfigError, InputError
from gate.globs import path_match
from gate.result import UngatedModel

NO_GROUP_REASON = ("no model group of roofgate.yaml covers it, so no rule judged it; add it "
                   "to a group's paths, or list it under 'ungated:' to skip it on purpose")


def is_onnx(path: str) -> bool:
    """Whether ``path`` names an ONNX file (by its suffix, any case)."""
    return path.lower().endswith(".onnx")


def ungated_model(config: ProjectConfig, path: str, *, deleted: bool = False) -> UngatedModel:
    """The record of an .onnx file no group covers: skipped on purpose, or not gated."""
    reason = config.skip_reason(path)
    if reason:
        return UngatedModel(path, f"skipped: {reason}", skipped=True)
    if deleted:
        return UngatedModel(path, "deleted; no model group covered it", skipped=True)
    return UngatedModel(path, NO_GROUP_REASON)


def check_globs(config: ProjectConfig, files: Sequence[str]) -> None:
    """ConfigError naming every path glob of the config file that matches none of ``files``."""
    if config.source is None:
        return
    problems = []
    for where, pattern in config.globs():
        if not any(path_match(pattern, f) for f in files):
            problems.append(f"{config.source}: {where}: glob '{pattern}' matches no file in the "
                            f"repository{_glob_hint(pattern, files)}; fix the glob (a glob that "
                            "matches nothing gates nothing)")
    if problems:
        raise ConfigError(problems)


def _glob_hint(pattern: str, files: Sequence[str]) -> str:
    """' (did you mean ...?)' with the glob's leading folders replaced by the closest existing
    ones, when that corrected glob matches a file; '' otherwise."""
    literal: list[str] = []
    for part in pattern.split("/")[:-1]:
        if any(c in part for c in "*?["):
            break
        literal.append(part)
    if not literal:
        return ""
    depth = len(literal)
    folders = sorted({"/".join(f.split("/")[:depth]) for f in files if f.count("/") >= depth})
    prefix = "/".join(literal)
    for close in difflib.get_close_matches(prefix, folders, n=3, cutoff=0.6):
        fixed = close + pattern[len(prefix):]
        if any(path_match(fixed, f) for f in files):
            return f" (did you mean '{fixed}'?)"
    return ""


def files_under(root: Path) -> list[str]:
    """Every file below ``root`` (outside ``.git``), as sorted root-relative POSIX paths
    (a link to nothing included, as ``walk_files`` lists it)."""
    return relative_names(root, walk_files(root))


def relative_names(root: Path, files: Iterable[Path]) -> list[str]:
    """``files`` (found below ``root``) as sorted root-relative POSIX paths."""
    return sorted(p.relative_to(root).as_posix() for p in files)


def walk_files(folder: Path) -> list[Path]:
    """Every file below ``folder`` outside ``.git`` folders, sorted. A link to nothing is
    listed (a model whose content was never fetched, as git-annex leaves it, or whose
    target moved), so the loader says what is wrong instead of the audit passing
    without it; links to folders are not walked into.

    One ``scandir`` per folder: the kind of each entry comes with it, so only links
    cost a further system call (``rglob`` and ``is_file`` took one or two per file:
    0.06 s for 1000 models, before any work). A folder that cannot be listed is an
    ``InputError``: skipping it would leave its models unchecked.
    """
    found: list[Path] = []
    pending = [str(folder)]
    while pending:
        where = pending.pop()
        try:
            entries = list(os.scandir(where))
        except OSError as exc:
            raise InputError(f"cannot list this folder ({exc.strerror}); its models would go "
                             "unchecked: make it readable, or leave it out of the paths",
                             where) from None
        for entry in entries:
            if entry.name == ".git":  # the repository's own folder, or a submodule's file
                continue
            if entry.is_dir(follow_symlinks=False):
                pending.append(entry.path)
            elif entry.is_file() or (entry.is_symlink() and not os.path.exists(entry.path)):
                found.append(Path(entry.path))
    return sorted(found)


def model_files(config: ProjectConfig, files: Iterable[str]) -> list[str]:
    """The files a model group covers."""
    return [f for f in files if config.is_model(f)]
