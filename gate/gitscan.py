"""Git plumbing for ``roofgate check``: the merge base, the changed models, file contents at a revision.

Git is always run as an argument list (``shell=False``) with ``-z`` output
and ``--`` before paths, so file names with spaces, quotes, leading dashes,
newlines or any unicode pass through untouched and are never interpreted by a
shell.

Contents are read as committed (``git cat-file blob``). A blob that is a Git LFS
pointer is resolved through the LFS filter (``git lfs smudge``) when the commit
it comes from tracks the path with LFS in its *own* ``.gitattributes`` files
(nested ones too; never the working tree's, which belong to HEAD: a pull request
that moves models into or out of LFS has different attributes on each side) and
the LFS object is already in the local store; nothing is downloaded here. A
model that stays a pointer is reported with the command that fetches it.
"""

from __future__ import annotations

import os
import re
import subprocess
import tempfile
from collections.abc import Callable, Mapping, Sequence
from contextlib import closing
from dataclasses import dataclass, replace
from pathlib import Path
from typing import IO, BinaryIO

from gate.errors import InputError, near_name

STAGED = ""  # as a revision: the index (what `git commit` would record), e.g. ":path"
LFS_POINTER_PREFIX = b"version https://git-lfs"
LFS_POINTER_MAX_BYTES = 1024  # pointer files are ~130 bytes; spec caps them at 1024
GIT_TIMEOUT_S = 300


@dataclass(frozen=True, slots=True)
class ModelChange:
    """One model that differs between the base and head revisions."""

    status: str  # "added", "deleted", "modified", "renamed", "copied", "type-changed"
    base_path: str | None  # path at the base revision; None when added
    head_path: str | None  # path at HEAD; None when deleted
    by_structure: bool = False  # a rename found by layer structure, not by git (gate/renames)
    # sides ("base", "head") git stores as a symbolic link (its blob is the link's target
    # path, not a model): never read as a model
    links: frozenset[str] = frozenset()

    @property
    def path(self) -> str:
        """How reports name the model: its head path (or base path when deleted)."""
        return self.head_path or self.base_path or ""


_STATUS = {"A": "added", "D": "deleted", "M": "modified", "R": "renamed", "C": "copied",
           "T": "type-changed"}


def git(args: Sequence[str], cwd: str | Path, *, what: str, stdout: BinaryIO | None = None,
        stdin: BinaryIO | None = None, env: Mapping[str, str] | None = None) -> bytes:
    """Run ``git <args>`` in ``cwd``; stdout bytes (or streamed to ``stdout``); InputError on failure.

    ``stdin`` feeds a file to git; ``env`` adds variables (e.g. a temporary index).
    """
    full_env = {**os.environ, "GIT_TERMINAL_PROMPT": "0", "LC_ALL": "C", **(env or {})}
    try:
        done = subprocess.run(
            ["git", "-c", "core.quotepath=off", *args], cwd=cwd, stdin=stdin,
            stdout=stdout if stdout is not None else subprocess.PIPE, stderr=subprocess.PIPE,
            shell=False, check=False, timeout=GIT_TIMEOUT_S, env=full_env,
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
        near = near_name(ref, _local_refs(cwd))
        typo = f" (did you mean '{near}'?)" if near else ""
        raise InputError(f"unknown git revision '{ref}'{typo}; {fetch_hint(ref, cwd)}") from None
    return out.decode("ascii").strip()


def _local_refs(cwd: str | Path) -> list[str]:
    """The branch and remote-tracking names this clone has (no network)."""
    try:
        out = git(["for-each-ref", "--format=%(refname:short)", "refs/heads", "refs/remotes"],
                  cwd, what="listing branches")
    except InputError:
        return []
    return out.decode("utf-8", "replace").split()


_COMMIT_ID = re.compile(r"^[0-9a-fA-F]{7,64}$")
_CI_HISTORY = ("in CI fetch full history: actions/checkout with fetch-depth: 0, GitLab "
               "GIT_DEPTH: 0")


def fetch_hint(ref: str, cwd: str | Path) -> str:
    """What makes ``ref`` resolvable: a fetch command (also right in a shallow
    single-branch clone), or, with no remote to fetch from, a local name or a SHA.

    ``git fetch origin main`` only updates FETCH_HEAD when the clone's refspec
    covers one branch (GitLab's default clone), so a remote-tracking name gets an
    explicit refspec that creates it. The remote is the one ``ref`` names, else
    ``origin``, else the only one; a ref whose first part names no remote is a
    branch (``release/1.2``), or a remote's name mistyped, which the hint says.
    """
    remotes = _remotes(cwd)
    named, _, branch = ref.partition("/")
    if branch and named in remotes:
        return (f"fetch it first: git fetch {named} {branch}:refs/remotes/{named}/{branch} "
                f"(or pass the base commit's SHA; {_CI_HISTORY})")
    remote = "origin" if "origin" in remotes else next(iter(remotes)) if len(remotes) == 1 \
        else None
    if remote is None:
        where = (f"remotes: {', '.join(sorted(remotes))}" if remotes
                 else "this repository has no remote")
        return (f"no remote to fetch it from ({where}); pass a branch or commit this "
                f"repository has (git branch -a lists them), or the base commit's SHA")
    if _COMMIT_ID.match(ref):
        command = f"fetch it first: git fetch {remote} {ref}"
    else:
        first = "fetch it first" if not branch else (
            f"there is no remote named '{named}' (remotes: {', '.join(sorted(remotes))}); "
            f"to fetch a branch of that name")
        command = (f"{first}: git fetch {remote} {ref}:refs/remotes/{remote}/{ref}, then "
                   f"--base {remote}/{ref}")
    return f"{command} (or pass the base commit's SHA; {_CI_HISTORY})"


def _remotes(cwd: str | Path) -> set[str]:
    try:
        out = git(["remote"], cwd, what="listing remotes")
    except InputError:
        return set()
    return set(out.decode("utf-8", "replace").split())


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


LINK_MODE = "120000"  # git's file mode of a symbolic link
SUBMODULE_MODE = "160000"  # git's file mode of a submodule (a commit, not a blob)


@dataclass(frozen=True, slots=True)
class RawChange:
    """One entry of ``git diff --raw -z``: the status letter, each side's path (None when
    the side does not exist), git's file mode and object name of each side (all zeros
    for a missing side)."""

    letter: str
    base_path: str | None
    head_path: str | None
    base_mode: str
    head_mode: str
    base_object: str
    head_object: str

    @property
    def links(self) -> frozenset[str]:
        """The sides ("base", "head") git stores as a symbolic link."""
        return frozenset(side for side, mode in (("base", self.base_mode),
                                                 ("head", self.head_mode)) if mode == LINK_MODE)


def parse_raw_diff(raw: bytes) -> list[RawChange]:
    """Parse ``git diff --raw -z`` output (renames and copies carry two paths)."""
    fields = raw.split(b"\0")
    if fields and fields[-1] == b"":
        fields.pop()
    out: list[RawChange] = []
    i = 0
    while i < len(fields):
        base_mode, head_mode, base_object, head_object, status = \
            fields[i].decode("ascii", "replace").lstrip(":").split()
        letter = status[:1]
        base: str | None
        head: str | None
        if letter in ("R", "C"):
            base, head = _decode(fields[i + 1]), _decode(fields[i + 2])
            i += 3
        else:
            path = _decode(fields[i + 1])
            base, head = (None if letter == "A" else path), (None if letter == "D" else path)
            i += 2
        out.append(RawChange(letter, base, head, base_mode, head_mode, base_object,
                             head_object))
    return out


def changed_models(base: str, cwd: str | Path, is_model: Callable[[str], bool],
                   head: str = "HEAD") -> list[ModelChange]:
    """Models changed from commit ``base`` to ``head`` (renames followed), sorted by path.

    ``head`` is a revision, or ``STAGED`` for the index (staged changes).

    A rename or copy counts when either side is a model; a model renamed to a path
    no glob covers is still judged (as renamed, under its old group), so moving a
    model out of the globs does not take it out of the gate; the reverse is an
    addition.
    """
    sides = ["--cached", base] if head == STAGED else [base, head]
    # -l0: no limit on rename detection (git skips it past 1000 files by default, with only
    # a warning); pairs git still misses are found by layer structure (gate/renames.py).
    raw = git(["diff", "--raw", "--no-abbrev", "-M", "-l0", "-z", "--no-ext-diff",
               "--no-textconv", *sides, "--"], cwd, what="listing changed files")
    changes = []
    for entry in parse_raw_diff(raw):
        change = _classify(entry.letter, entry.base_path, entry.head_path, is_model)
        if change is not None:
            kept = {side for side in entry.links if (change.base_path if side == "base"
                                                     else change.head_path) is not None}
            changes.append(replace(change, links=frozenset(kept)) if kept else change)
    return sorted(changes, key=lambda c: c.path)


def submodule_changes(base: str, cwd: str | Path, head: str = "HEAD",
                      ) -> list[tuple[str, str, str]]:
    """``(path, old commit, new commit)`` of every submodule moved, added or removed
    between ``base`` and ``head`` (``STAGED``: the index); a missing side is ''."""
    sides = ["--cached", base] if head == STAGED else [base, head]
    raw = git(["diff", "--raw", "-z", "--no-abbrev", "--no-renames", *sides, "--"], cwd,
              what="listing changed submodules")
    out = []
    for entry in parse_raw_diff(raw):
        if SUBMODULE_MODE in (entry.base_mode, entry.head_mode):
            old = entry.base_object if entry.base_mode == SUBMODULE_MODE else ""
            new = entry.head_object if entry.head_mode == SUBMODULE_MODE else ""
            out.append((entry.head_path or entry.base_path or "", old.strip("0") and old,
                        new.strip("0") and new))
    return out


def _classify(letter: str, old: str | None, new: str | None,
              is_model: Callable[[str], bool]) -> ModelChange | None:
    old_ok = old is not None and is_model(old)
    new_ok = new is not None and is_model(new)
    if letter == "U":
        raise InputError(f"{new}: unmerged path; resolve the merge conflict first")
    if letter == "C":  # a copy is a new file; its source is unchanged
        return ModelChange("added", None, new) if new_ok else None
    if letter == "R":  # moved out of the globs: still judged, under its old group
        if old_ok:
            return ModelChange("renamed", old, new)
        if new_ok:
            return ModelChange("added", None, new)
        return None
    if not (old_ok or new_ok):
        return None
    return ModelChange(_STATUS.get(letter, "modified"), old, new)


def tracked_files(cwd: str | Path, rev: str = "HEAD") -> list[str]:
    """Every file path in the tree of ``rev`` (``STAGED``: the index), repository-relative,
    sorted."""
    if rev == STAGED:
        raw = git(["ls-files", "-z", "--full-name", "--", ":/"], cwd, what="listing the index")
    else:
        raw = git(["ls-tree", "-r", "-z", "--name-only", "--full-tree", rev], cwd,
                  what=f"listing the files at {rev}")
    return sorted(_decode(item) for item in raw.split(b"\0") if item)


def read_raw_blob(rev: str, path: str, cwd: str | Path) -> bytes:
    """The bytes git stores for ``path`` at ``rev``: no filters or attributes applied."""
    return git(["cat-file", "blob", f"{rev}:{path}"], cwd, what=f"reading {path} at {rev[:12]}")


def read_blob(rev: str, path: str, cwd: str | Path) -> bytes:
    """The contents of ``path`` at ``rev`` (an LFS pointer resolved as ``write_blob`` does;
    one that stays a pointer is returned as it is)."""
    with tempfile.TemporaryDirectory(prefix="roofgate-blob-") as tmp, \
            closing(BlobReader(cwd)) as reader:
        spill = Path(tmp) / "blob"
        got = read_model_blob(reader, rev, path, cwd, spill)
        return got if isinstance(got, bytes) else spill.read_bytes()


def write_blob(rev: str, path: str, cwd: str | Path, dest: str | Path) -> bool:
    """Stream ``path`` at ``rev`` into ``dest``; False if it is (still) a Git LFS pointer.

    Streaming keeps memory flat for multi-gigabyte models. A pointer is replaced by
    its object when ``rev``'s own attributes track the path with LFS and the object
    is in the local LFS store (see the module docstring).
    """
    with open(dest, "wb") as out:
        git(["cat-file", "blob", f"{rev}:{path}"], cwd,
            what=f"reading {path} at {rev[:12] or 'the index'}", stdout=out)
    if not _is_pointer_file(dest):
        return True
    if filter_at(rev, path, cwd) != "lfs" or not _lfs_object_present(dest, cwd):
        return False
    _smudge_in_place(path, cwd, Path(dest))
    return not _is_pointer_file(dest)


SPILL_BYTES = 1024**3  # a blob this large goes to a file (streamed), not into memory


class BlobReader:
    """Blobs at revisions through ONE ``git cat-file --batch`` process (started on first use).

    A process per blob (and a temporary copy of each) cost most of a large check's
    time; here each blob's bytes go straight to the ONNX parser. Raw bytes, as
    ``read_raw_blob``: no filters or attributes. Close it (``contextlib.closing``).
    """

    def __init__(self, cwd: str | Path) -> None:
        self.cwd = cwd
        self._proc: subprocess.Popen[bytes] | None = None

    def close(self) -> None:
        proc, self._proc = self._proc, None
        if proc is not None:
            for stream in (proc.stdin, proc.stdout):
                if stream is not None:
                    stream.close()
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()

    def read(self, rev: str, path: str, spill_to: Path) -> bytes | Path:
        """The bytes of ``path`` at ``rev`` (``STAGED``: the index), or, for a blob of
        ``SPILL_BYTES`` or more, the file ``spill_to`` it was streamed into."""
        what = f"reading {path} at {rev[:12] or 'the index'}"
        spec = f"{rev}:{path}".encode("utf-8", "surrogateescape")
        if b"\n" in spec:  # the batch protocol is line-based: such a path gets its own git
            return git(["cat-file", "blob", f"{rev}:{path}"], self.cwd, what=what)
        proc = self._process()
        assert proc.stdin is not None and proc.stdout is not None
        try:
            proc.stdin.write(spec + b"\n")
            proc.stdin.flush()
            header = proc.stdout.readline()
        except OSError:
            header = b""
        fields = header.split()
        if len(fields) != 3 or fields[1] != b"blob":
            self.close()
            detail = " ".join(header.decode("utf-8", "replace").split()[-1:]) or "no answer"
            raise InputError(f"git failed while {what}: {detail}")
        size = int(fields[2])
        if size >= SPILL_BYTES:
            with open(spill_to, "wb") as out:
                _copy(proc.stdout, out, size)
            proc.stdout.read(1)  # the newline after the contents
            return spill_to
        data = proc.stdout.read(size)
        proc.stdout.read(1)
        if len(data) != size:
            self.close()
            raise InputError(f"git failed while {what}: the blob ended early")
        return data

    def _process(self) -> subprocess.Popen[bytes]:
        if self._proc is None:
            env = {**os.environ, "GIT_TERMINAL_PROMPT": "0", "LC_ALL": "C"}
            try:
                self._proc = subprocess.Popen(
                    ["git", "-c", "core.quotepath=off", "cat-file", "--batch"], cwd=self.cwd,
                    stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                    shell=False, env=env)
            except FileNotFoundError:
                raise InputError("git is not installed or not on PATH; install git") from None
        return self._proc


def _copy(source: IO[bytes], out: IO[bytes], size: int) -> None:
    left = size
    while left:
        chunk = source.read(min(left, 1 << 24))
        if not chunk:
            raise InputError("git ended a blob early")
        out.write(chunk)
        left -= len(chunk)


def read_model_blob(reader: BlobReader, rev: str, path: str, cwd: str | Path,
                    spill_to: Path) -> bytes | Path | None:
    """``path`` at ``rev`` for analysis: its bytes (or a spilled file), an LFS pointer resolved
    from the local store as ``write_blob`` does, or None when it stays a pointer."""
    got = reader.read(rev, path, spill_to)
    if isinstance(got, Path) or not is_lfs_pointer(got):
        return got
    spill_to.write_bytes(got)
    if filter_at(rev, path, cwd) != "lfs" or not _lfs_object_present(spill_to, cwd):
        return None
    _smudge_in_place(path, cwd, spill_to)
    return None if _is_pointer_file(spill_to) else spill_to


def filter_at(rev: str, path: str, cwd: str | Path) -> str | None:
    """The ``filter`` attribute of ``path`` as commit ``rev`` declares it, or None if unset.

    Git reads ``.gitattributes`` from the working tree (HEAD's); to use ``rev``'s own
    files, nested ones included, with git's matching rules, its tree is read into a
    temporary index and ``git check-attr --cached`` asks that index.
    """
    with tempfile.TemporaryDirectory(prefix="roofgate-attr-") as tmp:
        env: dict[str, str] = {}
        if rev != STAGED:  # the staged side asks the real index
            env["GIT_INDEX_FILE"] = str(Path(tmp) / "index")
            git(["read-tree", rev], cwd, what=f"reading the tree of {rev[:12]}", env=env)
        out = git(["check-attr", "--cached", "-z", "filter", "--", path], cwd,
                  what=f"reading the attributes of {path} at {rev[:12] or 'the index'}", env=env)
    fields = out.split(b"\0")
    value = fields[2].decode("utf-8", "replace") if len(fields) > 2 else "unspecified"
    return None if value in ("unspecified", "unset", "set") else value


_LFS_OID = re.compile(rb"^oid sha256:([0-9a-f]{64})$", re.MULTILINE)


def _lfs_object_present(pointer_file: str | Path, cwd: str | Path) -> bool:
    """Whether the object a pointer names is in the local LFS store (no download)."""
    match = _LFS_OID.search(Path(pointer_file).read_bytes())
    store = _lfs_media_dir(cwd)
    if match is None or store is None:
        return False
    oid = match.group(1).decode("ascii")
    return (store / oid[:2] / oid[2:4] / oid).is_file()


def _lfs_media_dir(cwd: str | Path) -> Path | None:
    """The local LFS object store (``git lfs env``), or None when git-lfs is not installed."""
    try:
        out = git(["lfs", "env"], cwd, what="asking git-lfs for its object store")
    except InputError:
        return None
    for line in out.decode("utf-8", "replace").splitlines():
        if line.startswith("LocalMediaDir="):
            return Path(line.partition("=")[2])
    return None


def _smudge_in_place(path: str, cwd: str | Path, dest: Path) -> None:
    """Replace the pointer in ``dest`` by its object through the LFS filter (``git lfs smudge``)."""
    smudged = dest.with_name(dest.name + ".smudged")
    with open(dest, "rb") as pointer, open(smudged, "wb") as out:
        git(["lfs", "smudge", "--", path], cwd, what=f"resolving the Git LFS pointer {path}",
            stdin=pointer, stdout=out, env={"GIT_LFS_SKIP_SMUDGE": "0"})
    os.replace(smudged, dest)


def _is_pointer_file(path: str | Path) -> bool:
    with open(path, "rb") as back:
        return is_lfs_pointer(back.read(LFS_POINTER_MAX_BYTES + 1))


def is_lfs_pointer(data: bytes) -> bool:
    """True when ``data`` is a Git LFS pointer file rather than real content."""
    return len(data) <= LFS_POINTER_MAX_BYTES and data.startswith(LFS_POINTER_PREFIX)


def lfs_error_message(path: str, side: str, rev: str | None = None) -> str:
    """One actionable line for a model that is still a Git LFS pointer."""
    commit = rev if rev not in (None, STAGED, "HEAD") else None
    if side == "base" or commit:
        fetch = f"git lfs fetch origin {commit or '<base commit>'}"
    else:
        fetch = "git lfs pull"
    return (f"{path}: the {side} side is a Git LFS pointer, not the model, and its LFS object "
            f"is not in the local store; install git-lfs and fetch it ({fetch}; in GitHub "
            "Actions: actions/checkout with lfs: true, and the roofgate action fetches the "
            "base side's objects)")


def _decode(raw: bytes) -> str:
    # Git paths are bytes; non-UTF-8 names survive via surrogateescape and round-trip to git.
    return raw.decode("utf-8", "surrogateescape")
