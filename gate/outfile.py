"""The one owner of output files: where they may go and how they are written.

'-' is stdout; folders are created. A path that names a stream rather than a file
(``stream_kind``: a character device such as /dev/null, a named pipe, bash's
``>(...)``, /dev/stdout) is written into, after the files, and is never removed or
replaced: renaming over /dev/null, as root in a CI container, would break every later
step that uses it. A file is first written to a partial file
created exclusively (``O_EXCL``, never through a symbolic link) under a name
unique to this process, then renamed into place, so a crash never leaves a
half-written file that a later step could read as a result, and a link
committed under a partial-file name is never followed.

A set of reports is written as one unit (``write_files``): every partial file
is complete before the first rename, and the report folders are locked
(``flock``) while the set is renamed in, so two runs writing the same folder
leave one run's complete set, never a mix. ``remove_stale`` deletes the reports
of an earlier run at the start, so an early exit cannot leave an old PASS.

``OutputRules`` says where a run may write (``check_output_paths``): a path
from the project config must resolve inside the working tree; no path may lie
in a ``.git`` folder or land on a file the run reads (models, policies, the
config, targets, baselines).
"""

from __future__ import annotations

import errno
import io
import os
import secrets
import stat
import sys
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import TextIO

from gate.errors import InputError, InternalError
from gate.forked import forking_available, run_tasks

try:  # POSIX; elsewhere the folder lock is skipped (one run per folder then)
    import fcntl
except ImportError:  # pragma: no cover - not on Linux or macOS
    fcntl = None  # type: ignore[assignment]

Writer = Callable[[TextIO], None]  # writes a file's text to a stream


@dataclass(frozen=True, slots=True)
class Parts:
    """A file written in consecutive parts, each by its own writer, so the parts can be
    rendered side by side: ``writers(count)`` (called once, in this process) returns the
    writers of at most ``count`` parts, at least one; the file is their texts in order."""

    writers: Callable[[int], Sequence[Writer]]


# What a file is written from: its text, a function that writes the text to a stream,
# or parts.
Content = str | Writer | Parts

PARTIAL_PREFIX = ".roofgate-"
PARTIAL_SUFFIX = ".partial"
NAME_MAX_BYTES = 255  # longest file name ext4, XFS, APFS and NTFS accept (POSIX NAME_MAX)
# read and write: the parts of a file in parts are read back to be joined
_CREATE_FLAGS = (os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0)
                 | getattr(os, "O_CLOEXEC", 0))


@dataclass(frozen=True, slots=True)
class OutputRules:
    """Where a run may write its reports.

    ``root``: paths must resolve inside this folder (None: anywhere, for paths
    the person running the command typed). ``typed``: paths given on the
    command line, exempt from ``root`` (the person running the command chose
    them; a pull request can only change the config's). ``inputs``: files the
    run reads, which no output may replace. ``is_model``: whether a
    root-relative path is a model of the project (those are inputs too).
    """

    root: str | None = None
    inputs: tuple[str, ...] = ()
    is_model: Callable[[str], bool] | None = None
    typed: tuple[str, ...] = ()


# The rules of a command whose every output path is typed by the person running it: anywhere
# but inside .git (an empty set of inputs).
TYPED_PATHS = OutputRules()


def check_output_paths(paths: Mapping[str, str], rules: OutputRules) -> None:
    """Refuse (InputError, exit 2) an output path outside where ``rules`` allow, or one used twice.

    ``paths`` maps what is written ("junit report") to its path ('-' = stdout).
    """
    inputs = {_real(p) for p in rules.inputs if p and p != "-"}
    seen: dict[Path, str] = {}
    for what, path in paths.items():
        if path == "-":
            continue
        target = placed_path(path, what)
        kind = stream_kind(path)
        reason = _placement_problem(target, path, rules, inputs) or (
            "it is a block device (a disk); a report goes to a file, a pipe or a character "
            "device such as /dev/null" if kind == BLOCK_DEVICE else "")
        if reason:
            raise InputError(f"the {what} may not be written here: {reason}; choose a path "
                             "inside the working tree, such as roofgate-out/", path)
        if kind == STREAM:
            continue  # written into, like stdout: two reports may share /dev/null
        if target in seen:
            raise InputError(f"the {what} and the {seen[target]} would be written to the same "
                             "file; give each report its own path", path)
        seen[target] = what


def placed_path(path: str, what: str) -> Path:
    """The absolute path ``path`` writes to: its folder with links resolved, then its name."""
    given = Path(path)
    if given.name in ("", ".", "..") or path.endswith(("/", os.sep)):
        raise InputError(f"the {what} may not be written here: the path names a folder, not "
                         "a file; give a file path such as roofgate-out/result.json", path)
    try:
        return given.parent.resolve() / given.name
    except (OSError, RuntimeError) as exc:  # a link loop in the folder
        raise InputError(f"cannot resolve the folder of the {what} ({exc})", path) from None


STREAM, BLOCK_DEVICE = "stream", "block device"


def stream_kind(path: str) -> str | None:
    """``STREAM`` if ``path`` names a stream to write into rather than a file to replace:
    a character device, a named pipe or a socket there, or a link in /dev or /proc
    (/dev/stdout, /dev/fd/63 from bash's ``>(...)``); ``BLOCK_DEVICE`` for a disk; None
    for a file, a folder, a link anywhere else, or nothing yet ('-' is stdout, not this).

    A link outside /dev and /proc is never followed here: a link in the working tree
    (one a pull request can commit) is replaced like a file, never written through.
    """
    if path == "-":
        return None
    try:
        mode = os.lstat(path).st_mode
        link = stat.S_ISLNK(mode)
        if link:
            if not _in_system_folder(path):
                return None
            mode = os.stat(path).st_mode
    except (OSError, ValueError):
        return None  # nothing there (or a dangling link): a new file
    if stat.S_ISBLK(mode):
        return BLOCK_DEVICE
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
        # a link in /dev or /proc to a file (stdout redirected to one) is a stream still
        return STREAM if link else None
    return STREAM


def goes_to_stdout(path: str) -> bool:
    """Whether writing ``path`` writes to this process's stdout: '-', or a stream that is
    stdout's own file (/dev/stdout, /proc/self/fd/1), so the caller moves its own
    messages to stderr instead of mixing them into the report (not when both are the
    null device)."""
    if path == "-":
        return True
    if stream_kind(path) != STREAM:
        return False
    try:
        there, out = os.stat(path), os.fstat(sys.stdout.fileno())
        null = os.stat(os.devnull)
    except (OSError, ValueError, AttributeError):  # stdout closed or not a real file
        return False
    same = (there.st_dev, there.st_ino) == (out.st_dev, out.st_ino)
    # both discarded (``--junit /dev/null > /dev/null``): nothing would mix, nothing moves
    return same and (there.st_dev, there.st_ino) != (null.st_dev, null.st_ino)


def _in_system_folder(path: str) -> bool:
    """Whether ``path``'s folder (links resolved) is /dev or lies in /proc."""
    try:
        folder = Path(os.path.abspath(path)).parent.resolve()
    except (OSError, RuntimeError):
        return False
    return folder == Path("/dev") or folder.is_relative_to("/proc")


def _placement_problem(target: Path, path: str, rules: OutputRules, inputs: set[Path]) -> str:
    if len(os.fsencode(target.name)) > NAME_MAX_BYTES:
        return f"the file name is too long ({len(os.fsencode(target.name))} bytes; " \
               f"file systems allow {NAME_MAX_BYTES})"
    if ".git" in target.parts:
        return "it lies inside a .git folder (git's own files)"
    root = Path(rules.root).resolve() if rules.root is not None else None
    if root is not None and path not in rules.typed and not target.is_relative_to(root):
        return f"it resolves to {target}, outside the working tree {root}"
    if target in inputs:
        return "it is a file this run reads (a model, policy, config, target or baseline)"
    if target.suffix.lower() == ".onnx":
        return "it is a model path"
    if root is not None and rules.is_model is not None and target.is_relative_to(root) \
            and rules.is_model(target.relative_to(root).as_posix()):
        return "it is a model path"
    return ""


def _real(path: str) -> Path:
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError):
        return Path(os.path.abspath(path))


# --- writing ---------------------------------------------------------------------------

def write_files(files: Sequence[tuple[str, str, Content]], processes: int = 1) -> None:
    """Write every ``(path, what, content)`` as one unit; '-' paths go to stdout last.

    ``content`` is the text, or (files only) a function that writes it to a
    stream, so a large report goes to its partial file in pieces instead of
    being held whole in memory, or ``Parts``; if any raises, nothing of the set
    is written. With ``processes`` > 1 the partial files (and the parts of a
    file, joined afterwards) are written side by side (``gate.forked``). All
    partial files are written before any is renamed into place; the folders
    are locked during the renames; if a rename fails, the files of this set
    already moved in are removed again, so no mix is left.
    """
    if any(path == "-" and not isinstance(content, str) for path, _, content in files):
        raise TypeError("stdout takes text (render it first), not a writer")
    kinds = [stream_kind(path) for path, _, _ in files]
    # a stream cannot be unwritten: its text is rendered whole before anything is written
    streams = [(path, what, _rendered(content))
               for (path, what, content), kind in zip(files, kinds) if kind == STREAM]
    on_disk = [(placed_path(p, what), p, what, text)
               for (p, what, text), kind in zip(files, kinds) if p != "-" and kind != STREAM]
    folders = sorted({target.parent for target, *_ in on_disk})
    for target, path, what, _ in on_disk:
        _make_folder(target.parent, path, what)
    parts = processes if forking_available() else 1
    with _locked(folders):
        created = _Created()
        placed: list[tuple[Path, Path, str, str]] = []
        joins: list[tuple[list[int], str, str]] = []
        try:
            run_tasks(_fill_tasks(on_disk, parts, created, placed, joins), processes)
            for descriptors, path, what in joins:
                _join(descriptors, path, what)
            _rename_all(placed)
        finally:
            created.remove()
    for path, what, whole in streams:
        _write_stream(path, what, whole)
    for path, _, content in files:
        if path == "-":
            write_stdout(content)  # type: ignore[arg-type]  # text: checked at the start


def write_text(path: str, text: str, what: str) -> None:
    """Write one file ('-' = stdout) atomically."""
    write_files([(path, what, text)])


@contextmanager
def open_output(path: str, what: str) -> Iterator[TextIO]:
    """A text stream for ``path`` ('-' = stdout); the file appears only when the block succeeds."""
    if path == "-":
        yield sys.stdout
        return
    if stream_kind(path) == STREAM:
        buffer = io.StringIO()  # a stream cannot be unwritten: written once the block succeeds
        yield buffer
        _write_stream(path, what, buffer.getvalue())
        return
    target = placed_path(path, what)
    _make_folder(target.parent, path, what)
    name, fd = _new_partial(target.parent, path, what)
    try:
        try:
            with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as stream:
                yield stream
        except OSError as exc:
            raise _write_error(exc, path, what) from None
        with _locked([target.parent]):
            _rename_all([(name, target, path, what)])
    finally:
        _unlink_quietly(name)


def _write_stream(path: str, what: str, text: str) -> None:
    """Write ``text`` into the stream at ``path``, opened for appending (never created,
    never truncated: a device, a pipe, or /dev/stdout redirected to a file, which must
    not be overwritten from its start); stdout is flushed first so what it already holds
    comes before."""
    try:
        sys.stdout.flush()
    except (OSError, ValueError):
        pass  # a broken stdout is reported where stdout itself is written
    try:
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | getattr(os, "O_NOCTTY", 0)
                     | getattr(os, "O_CLOEXEC", 0))
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as stream:
            stream.write(text)
    except OSError as exc:
        raise _write_error(exc, path, what) from None


def _rendered(content: Content) -> str:
    """The whole text of ``content``."""
    if isinstance(content, str):
        return content
    buffer = io.StringIO()
    for writer in content.writers(1) if isinstance(content, Parts) else [content]:
        _put(buffer, writer)
    return buffer.getvalue()


def _put(stream: TextIO, content: str | Writer) -> None:
    """Write ``content`` (its text, or a function that writes it) to ``stream``."""
    if isinstance(content, str):
        stream.write(content)
    else:
        content(stream)


def write_stdout(text: str) -> None:
    """Write ``text`` to stdout; a full or closed stdout is bad output (exit 2), not a crash."""
    try:
        sys.stdout.write(text)
        sys.stdout.flush()
    except OSError as exc:
        raise InputError(f"cannot write to standard output ({exc.strerror}); "
                         "check where stdout is redirected") from None


def remove_stale(paths: Sequence[str]) -> None:
    """Delete the files at ``paths`` (reports of an earlier run) and partial files of dead runs.

    Called at the start of a run, after ``check_output_paths``, so an early
    exit cannot leave an old report that reads as this run's result.
    """
    files = [p for p in paths if p != "-" and stream_kind(p) is None]
    folders = sorted({placed_path(p, "report").parent for p in files})
    existing = [f for f in folders if f.is_dir()]
    with _locked(existing):
        for path in files:
            _unlink_or_fail(placed_path(path, "report"), path)
        for folder in existing:
            _remove_dead_partials(folder)


def _rename_all(partials: Sequence[tuple[Path, Path, str, str]]) -> None:
    done: list[Path] = []
    try:
        for partial, target, path, what in partials:
            if target.is_dir() and not target.is_symlink():
                raise InputError(f"cannot write the {what} (a folder is in the way)", path)
            try:
                os.replace(partial, target)
            except OSError as exc:
                raise _write_error(exc, path, what) from None
            done.append(target)
    except BaseException:
        for target in done:
            _unlink_quietly(target)
        raise


class _Created:
    """The partial files of one ``write_files``: each open until the end, then removed
    (the ones renamed into place are no longer there)."""

    def __init__(self) -> None:
        self.files: list[tuple[Path, int]] = []

    def new(self, folder: Path, path: str, what: str) -> tuple[Path, int]:
        created = _new_partial(folder, path, what)
        self.files.append(created)
        return created

    def remove(self) -> None:
        for name, fd in self.files:
            os.close(fd)
            _unlink_quietly(name)


def _fill_tasks(on_disk: Sequence[tuple[Path, str, str, Content]], parts: int,
                created: _Created, placed: list[tuple[Path, Path, str, str]],
                joins: list[tuple[list[int], str, str]]) -> Iterator[tuple[str, Callable[[], None]]]:
    """One task per partial file to fill, its file created just before; a file in parts
    gets one partial file per part (the first is the one renamed in, the others are
    joined to it after: ``joins``). ``Parts.writers`` runs here, between tasks."""
    for target, path, what, content in on_disk:
        name, fd = created.new(target.parent, path, what)
        placed.append((name, target, path, what))
        if not isinstance(content, Parts):
            yield what, partial(_fill, fd, content, path, what)
            continue
        writers = content.writers(parts)
        if not writers:
            raise InternalError(f"the {what} came in no parts at all")
        descriptors = [fd] + [created.new(target.parent, path, what)[1] for _ in writers[1:]]
        joins.append((descriptors, path, what))
        for part_fd, writer in zip(descriptors, writers):
            yield what, partial(_fill, part_fd, writer, path, what)


def _join(descriptors: Sequence[int], path: str, what: str) -> None:
    """Append the second and later parts' files to the first's."""
    first, *rest = descriptors
    try:
        os.lseek(first, 0, os.SEEK_END)
        for part in rest:
            _append(first, part)
    except OSError as exc:
        raise _write_error(exc, path, what) from None


def _append(target: int, source: int) -> None:
    """Copy the whole file open at ``source`` to the end of ``target`` (in the kernel where
    it can: copy_file_range)."""
    offset = 0
    while True:
        try:
            copied = os.copy_file_range(source, target, 1 << 30, offset)
        except (AttributeError, OSError) as exc:
            if isinstance(exc, OSError) and exc.errno not in _NO_KERNEL_COPY:
                raise
            break
        if copied == 0:
            return
        offset += copied
    while chunk := os.pread(source, 1 << 20, offset):
        offset += len(chunk)
        view = memoryview(chunk)
        while view:
            view = view[os.write(target, view):]


_NO_KERNEL_COPY = {errno.EXDEV, errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP}


def _fill(fd: int, content: str | Writer, path: str, what: str) -> None:
    """Write ``content`` to the partial file open at ``fd`` (through a duplicate, so the
    caller closes ``fd`` itself, whichever process wrote)."""
    try:
        with os.fdopen(os.dup(fd), "w", encoding="utf-8", newline="\n") as stream:
            _put(stream, content)
    except OSError as exc:
        raise _write_error(exc, path, what) from None


def _new_partial(folder: Path, path: str, what: str) -> tuple[Path, int]:
    """A new, empty partial file in ``folder``, created exclusively (never through a link)."""
    name = folder / f"{PARTIAL_PREFIX}{os.getpid()}-{secrets.token_hex(8)}{PARTIAL_SUFFIX}"
    try:
        return name, os.open(name, _CREATE_FLAGS, 0o666)
    except OSError as exc:
        raise _write_error(exc, path, what) from None


def _make_folder(folder: Path, path: str, what: str) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _write_error(exc, path, what) from None


def _write_error(exc: OSError, path: str, what: str) -> InputError:
    reason = exc.strerror or type(exc).__name__
    if exc.errno == errno.ENAMETOOLONG:
        reason = "the file name is too long for the file system"
    return InputError(f"cannot write the {what} ({reason})", path)


@contextmanager
def _locked(folders: Sequence[Path]) -> Iterator[None]:
    """Hold an exclusive ``flock`` on each folder (sorted, so two runs never deadlock)."""
    with ExitStack() as stack:
        if fcntl is not None:
            for folder in sorted(set(folders)):
                fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
                stack.callback(os.close, fd)
                fcntl.flock(fd, fcntl.LOCK_EX)
        yield


def _remove_dead_partials(folder: Path) -> None:
    """Partial files left by runs that were killed (their process no longer exists)."""
    try:
        names = [n for n in os.listdir(folder)
                 if n.startswith(PARTIAL_PREFIX) and n.endswith(PARTIAL_SUFFIX)]
    except OSError:
        return
    for name in names:
        pid_text = name[len(PARTIAL_PREFIX):].split("-", 1)[0]
        if pid_text.isdigit() and not _alive(int(pid_text)):
            _unlink_quietly(folder / name)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def _unlink_or_fail(target: Path, path: str) -> None:
    """Remove a file or link at ``target`` (a folder there is left for the write to refuse)."""
    try:
        if target.is_dir() and not target.is_symlink():
            return
        target.unlink()
    except FileNotFoundError:
        pass
    except OSError as exc:
        raise InputError(f"cannot remove the report of an earlier run ({exc.strerror})",
                         path) from None


def _unlink_quietly(path: Path) -> None:
    try:
        path.unlink()
    except OSError:
        pass
