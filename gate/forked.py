"""Run a few functions at the same time, in short-lived forked child processes.

After a parallel run (``-j N``) the reports are rendered one after another while
every other core idles: for 1000 changed models the JSON report alone took over a
second, beside a quarter of a second each for JUnit and markdown. ``run_tasks``
renders them side by side instead, each task in a child made with ``fork`` (which
shares the finished result with the parent: nothing is copied or pickled). Tasks
may come from a generator: whatever it does between tasks (building the JSON
document once before its parts are rendered) runs here while the children already
work. Each child writes only its own partial file; the parent renames nothing
until every task succeeded, so the all-or-nothing rule of report writing is
unchanged.

A child's failure comes back to the parent as the same kind of error: a
``RoofgateError`` with its message and exit code (a full disk stays exit 2), any
other exception as an ``InternalError`` (exit 3) whose cause carries the child's
traceback (shown under ``--debug``), a child killed by a signal as an
``InternalError`` too. If anything fails, or the parent is interrupted, the
children still running are killed and reaped before the error goes on.

Fork is used on Linux only (macOS and Windows run the tasks one after another):
there it is safe for a process whose worker pool has been shut down, and it is
the only way to share the result without copying it.
"""

from __future__ import annotations

import gc
import json
import os
import select
import signal
import sys
import threading
import traceback
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from gate.errors import EXIT_INTERNAL, InputError, InternalError, RoofgateError

Task = Callable[[], None]

# A child's report of its failure: at most this many bytes, so writing it never waits for
# the parent (a pipe holds 64 KiB). Its parts are cut so that even escaped as \uXXXX they
# fit, and a message that would not fit is sent shorter, never cut mid-JSON.
_MESSAGE_BYTES = 60 * 1024
_MESSAGE_CHARS = 2_000
_TRACEBACK_CHARS = 6_000


class ChildTraceback(Exception):
    """The traceback of a task that crashed in a child process, as text (its cause)."""


def default_processes(requested: int) -> int:
    """The processes ``-j N`` asks for: ``-j 0`` means one per CPU."""
    return requested if requested > 0 else (os.cpu_count() or 1)


def forking_available() -> bool:
    """Whether ``run_tasks`` runs tasks side by side here: on Linux, and only while this
    process runs one thread (a child forked beside another thread could inherit a lock
    that thread holds, forever; the CLI's worker pool is shut down by then)."""
    return sys.platform.startswith("linux") and hasattr(os, "fork") \
        and threading.active_count() == 1


def run_tasks(tasks: Iterable[tuple[str, Task]], processes: int) -> None:
    """Run every ``(label, task)``: one after another here when ``processes`` <= 1 or
    fork is not safe, else each in its own child process, all at once.

    The label names the task in errors ("json report"). Returns when every task
    has finished; raises the first failure to happen (the other children are then
    killed, not waited for).
    """
    if processes <= 1 or not forking_available():
        for _, task in tasks:
            task()
        return
    _flush_standard_streams()  # a child must not inherit (and never writes) unflushed text
    children: list[_Child] = []
    try:
        for label, task in tasks:
            children.append(_fork(label, task))
        _wait_all(children)
    finally:
        for child in children:
            child.stop()


def _wait_all(children: list[_Child]) -> None:
    """Reap the children as they end (a child's pipe reads as ended, or holds its failure,
    once it is done), raising the first failure at once."""
    running = list(children)
    while running:
        ready, _, _ = select.select([child.messages for child in running], [], [])
        for child in running:
            if child.messages in ready:
                child.wait()
        running = [child for child in running if not child.reaped]


@dataclass
class _Child:
    label: str
    pid: int
    messages: int  # read end of the pipe the child reports a failure on
    reaped: bool = False

    def wait(self) -> None:
        """Wait for the child; raise its failure, if it had one."""
        _, status = os.waitpid(self.pid, 0)
        self.reaped = True
        try:
            if os.WIFSIGNALED(status):
                raise InternalError(
                    f"internal error: the process writing the {self.label} was ended by "
                    f"signal {os.WTERMSIG(status)}; rerun with --debug and report it")
            if os.waitstatus_to_exitcode(status) != 0:
                raise _failure(self.label, os.read(self.messages, _MESSAGE_BYTES))
        finally:
            self._close()

    def stop(self) -> None:
        """Kill and reap the child if it is still running (after a failure or Ctrl-C)."""
        if not self.reaped:
            try:
                os.kill(self.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            os.waitpid(self.pid, 0)
            self.reaped = True
        self._close()

    def _close(self) -> None:
        if self.messages >= 0:
            os.close(self.messages)
            self.messages = -1


def _fork(label: str, task: Task) -> _Child:
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: run the task, report how it ended, never return
        os.close(read_end)
        _run_child(task, write_end)
    os.close(write_end)
    return _Child(label, pid, read_end)


def _run_child(task: Task, messages: int) -> None:
    """In the child: run ``task`` and leave with status 0, or 1 after writing why to
    ``messages``. ``os._exit`` skips the parent's exit handlers and buffered output."""
    status = 1
    try:
        # Ctrl-C or SIGTERM ends a child at once; the parent cleans up.
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        gc.disable()  # short-lived: no collection walking the parent's whole heap
        try:
            task()
            status = 0
        except BaseException as exc:  # noqa: BLE001  (every failure goes to the parent)
            os.write(messages, _describe(exc))
    finally:
        os._exit(status)


def _describe(exc: BaseException) -> bytes:
    """A child's failure as a small JSON message (bounded in size)."""
    if isinstance(exc, RoofgateError):
        data = {"message": exc.message[:_MESSAGE_CHARS], "exit_code": exc.exit_code}
    else:
        data = {"crash": " ".join(f"{type(exc).__name__}: {exc}".split())[:300],
                "traceback": "".join(traceback.format_exception(
                    type(exc), exc, exc.__traceback__))[-_TRACEBACK_CHARS:]}
    return json.dumps(data).encode("ascii")  # 6 bytes a character at most: under the bound


def _failure(label: str, message: bytes) -> RoofgateError:
    """The parent's error for a child that failed with ``message`` (see ``_describe``)."""
    try:
        data = json.loads(message)
    except ValueError:
        return InternalError(f"internal error: the process writing the {label} failed without "
                             "saying why; rerun with --debug and report it")
    if "message" in data:
        kind = InternalError if data.get("exit_code") == EXIT_INTERNAL else InputError
        return kind(str(data["message"]))
    error = InternalError(f"internal error while writing the {label} ({data.get('crash')}); "
                          "rerun with --debug and report the traceback")
    error.__cause__ = ChildTraceback(str(data.get("traceback", "")))
    return error


def _flush_standard_streams() -> None:
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass  # a closed or full stream: the parent meets it again when it writes
