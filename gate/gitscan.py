"""Git plumbing for ``roofgate check``: the merge base, the changed models, file contents at a revision.

Git is always run as an argument list (``shell=False``) with ``-z`` output
and ``--`` before paths, so file names with spaces, quotes, leading dashes,
newlines or any unicode pass through untouched and are never interpreted by a
shell. Contents are read with ``git cat-file --filters`` so Git LFS files are
smudged to the real model when the LFS objects are present; a model that is
still an LFS pointer is reported with the command that fetches it.
"""

from __future__ import annotations

import os
import subprocess
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from gate.errors import InputError

LFS_POINTER_PREFIX = b"version https://git-lfs"
LFS_POINTER_MAX_BYTES = 1024  # pointer files are ~130 bytes; spec caps them at 1024
GIT_TIMEOUT_S = 300


@dataclass(frozen=True, slots=True)
class ModelChange:
    """One model that differs between the base and head revisions."""

    status: str  # "added", "deleted", "modified", "renamed", "copied", "type-changed"
    base_path: str | None  # path at the base revision; None when added
    head_path: str | None  # path at HEAD; None when deleted

    @property
    def path(self) -> str:
        """How reports name the model: its head path (or base path when deleted)."""
        return self.head_path or self.base_path or ""


_STATUS = {"A": "added", "D": "deleted", "M": "modified", "R": "renamed", "C": "copied",
           "T": "type-changed"}


def git(args: Sequence[str], cwd: str | Path, *, what: str, stdout: BinaryIO | None = None,
        ) -> bytes:
    """Run ``git <args>`` in ``cwd``; stdout bytes (or streamed to ``stdout``); InputError on failure."""
    env = {**os.environ, "GIT_TERMINAL_PROMPT": "0", "LC_ALL": "C"}
    try:
        done = subprocess.run(
            ["git", "-c", "core.quotepath=off", *args], cwd=cwd,
            stdout=stdout if stdout is not None else subprocess.PIPE, stderr=subprocess.PIPE,
            shell=False, check=False, timeout=GIT_TIMEOUT_S, env=env,
        )
    except FileNotFoundError:
        raise InputError("git is not installed or not on PATH; install git") from None
    except subprocess.TimeoutExpired:
        raise InputError(f"git timed out while {what}") from None
    if done.returncode != 0:
        detail = " ".join(done.stderr.decode("utf-8", "replace").split())[:300]
        raise InputError(f"git failed while {what}: {detail or 'exit ' + str(done.returncode)}")
    return done.stdout or b""


def repo_root(cwd: str | Path = ".") -> Path:
    """The top folder of the git work tree containing ``cwd``."""
    out = git(["rev-parse", "--show-toplevel"], cwd, what="finding the repository root "
              "(run roofgate check inside a git repository)")
    return Path(out.decode("utf-8", "surrogateescape").rstrip("\n"))


def resolve_commit(ref: str, cwd: str | Path) -> str:
    """The full commit id ``ref`` names; InputError with a fetch hint if unknown."""
    if ref.startswith("-"):
        raise InputError(f"'{ref}' is not a git revision (it starts with '-')")
    try:
        out = git(["rev-parse", "--verify", "--quiet", "--end-of-options", f"{ref}^{{commit}}"],
                  cwd, what=f"resolving '{ref}'")
    except InputError:
        raise InputError(
            f"unknown git revision '{ref}'; fetch it first (e.g. git fetch origin {ref}, or "
            "actions/checkout with fetch-depth: 0)") from None
    return out.decode("ascii").strip()


def merge_base(ref: str, cwd: str | Path, head: str = "HEAD") -> str:
    """The merge base of ``ref`` and ``head``; InputError explaining shallow clones if none."""
    base = resolve_commit(ref, cwd)
    head_id = resolve_commit(head, cwd)
    try:
        out = git(["merge-base", base, head_id], cwd, what=f"finding the merge base of {ref}")
    except InputError:
        raise InputError(
            f"no merge base between '{ref}' and {head}; the clone is probably shallow: fetch "
            "full history (git fetch --unshallow, or actions/checkout with fetch-depth: 0)"
        ) from None
    return out.decode("ascii").strip()


def parse_name_status(raw: bytes) -> list[tuple[str, str | None, str | None]]:
    """Parse ``git diff --name-status -z`` output into (status letter, base path, head path)."""
    fields = raw.split(b"\0")
    if fields and fields[-1] == b"":
        fields.pop()
    out: list[tuple[str, str | None, str | None]] = []
    i = 0
    while i < len(fields):
        letter = fields[i].decode("ascii", "replace")[:1]
        if letter in ("R", "C"):
            old, new = _decode(fields[i + 1]), _decode(fields[i + 2])
            out.append((letter, old, new))
            i += 3
            continue
        path = _decode(fields[i + 1])
        out.append((letter, None if letter == "A" else path, None if letter == "D" else path))
        i += 2
    return out


def changed_models(base: str, cwd: str | Path, is_model: Callable[[str], bool],
                   head: str = "HEAD") -> list[ModelChange]:
    """Models changed from commit ``base`` to ``head`` (renames followed), sorted by path.

    A rename or copy counts when either side is a model; a rename that makes
    a file stop being a model counts as a deletion, the reverse as an addition.
    """
    raw = git(["diff", "--name-status", "-M", "-z", "--no-ext-diff", "--no-textconv",
               base, head, "--"], cwd, what="listing changed files")
    changes = []
    for letter, old, new in parse_name_status(raw):
        change = _classify(letter, old, new, is_model)
        if change is not None:
            changes.append(change)
    return sorted(changes, key=lambda c: c.path)


def _classify(letter: str, old: str | None, new: str | None,
              is_model: Callable[[str], bool]) -> ModelChange | None:
    old_ok = old is not None and is_model(old)
    new_ok = new is not None and is_model(new)
    if letter == "U":
        raise InputError(f"{new}: unmerged path; resolve the merge conflict first")
    if letter == "C":  # a copy is a new file; its source is unchanged
        return ModelChange("added", None, new) if new_ok else None
    if letter == "R":
        if old_ok and new_ok:
            return ModelChange("renamed", old, new)
        if new_ok:
            return ModelChange("added", None, new)
        if old_ok:
            return ModelChange("deleted", old, None)
        return None
    if not (old_ok or new_ok):
        return None
    return ModelChange(_STATUS.get(letter, "modified"), old, new)


def read_blob(rev: str, path: str, cwd: str | Path) -> bytes:
    """The contents of ``path`` at ``rev``, through the repository's filters (Git LFS smudge)."""
    return git(["cat-file", "--filters", f"{rev}:{path}"], cwd,
               what=f"reading {path} at {rev[:12]}")


def write_blob(rev: str, path: str, cwd: str | Path, dest: str | Path) -> bool:
    """Stream ``path`` at ``rev`` (filtered, as ``read_blob``) into ``dest``; False if an LFS pointer.

    Streaming keeps memory flat for multi-gigabyte models.
    """
    with open(dest, "wb") as out:
        git(["cat-file", "--filters", f"{rev}:{path}"], cwd,
            what=f"reading {path} at {rev[:12]}", stdout=out)
    with open(dest, "rb") as back:
        head = back.read(LFS_POINTER_MAX_BYTES + 1)
    return not is_lfs_pointer(head)


def is_lfs_pointer(data: bytes) -> bool:
    """True when ``data`` is a Git LFS pointer file rather than real content."""
    return len(data) <= LFS_POINTER_MAX_BYTES and data.startswith(LFS_POINTER_PREFIX)


def lfs_error_message(path: str, side: str) -> str:
    """One actionable line for a model that is still an un-fetched Git LFS pointer."""
    return (f"{path}: the {side} side is a Git LFS pointer, not the model; fetch LFS files "
            "(git lfs pull, or git lfs fetch origin <ref> for the base; in GitHub Actions "
            "use actions/checkout with lfs: true)")


def _decode(raw: bytes) -> str:
    # Git paths are bytes; non-UTF-8 names survive via surrogateescape and round-trip to git.
    return raw.decode("utf-8", "surrogateescape")
