"""Reports written side by side (gate/forked.py through gate/outfile.write_files).

After a ``-j N`` run every report file but the last is rendered in a forked child.
These tests pin what must not change with that: the bytes, the all-or-nothing rule
(a failure anywhere leaves no file of the set and no partial file), the kind of error
a child's failure becomes (exit 2 stays 2, a bug is exit 3), and that no child is
left running.
"""

from __future__ import annotations

import os
import signal
import time
from collections.abc import Callable
from pathlib import Path
from typing import TextIO

import pytest

from gate.errors import EXIT_INTERNAL, InputError, InternalError
from gate.forked import ChildTraceback, forking_available, run_tasks
from gate.outfile import write_files

pytestmark = pytest.mark.skipif(not forking_available(), reason="side by side on Linux only")

Writer = Callable[[TextIO], None]


def _pid_writer(stream: TextIO) -> None:
    stream.write(f"{os.getpid()}\n")


def _files(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_every_file_but_the_last_is_written_by_another_process(tmp_path: Path) -> None:
    paths = [tmp_path / f"{name}.txt" for name in "abc"]
    write_files([(str(p), p.stem, _pid_writer) for p in paths], processes=2)
    writers = [int(p.read_text()) for p in paths]
    assert writers[-1] == os.getpid()
    assert os.getpid() not in writers[:-1]
    assert len(set(writers)) == 3  # one child per file


def test_one_process_writes_everything_here(tmp_path: Path) -> None:
    paths = [tmp_path / f"{name}.txt" for name in "ab"]
    write_files([(str(p), p.stem, _pid_writer) for p in paths], processes=1)
    assert {int(p.read_text()) for p in paths} == {os.getpid()}


def test_same_bytes_side_by_side_as_one_after_another(tmp_path: Path) -> None:
    def big(stream: TextIO) -> None:
        # several MiB: more than any pipe or stream buffer
        stream.writelines(f"row {k} \u00e9\n" for k in range(200_000))

    for processes in (1, 2):
        folder = tmp_path / str(processes)
        write_files([(str(folder / "big.txt"), "big", big),
                     (str(folder / "text.txt"), "text", "plain text\n"),
                     (str(folder / "last.txt"), "last", big)], processes=processes)
    for name in ("big.txt", "text.txt", "last.txt"):
        assert (tmp_path / "1" / name).read_bytes() == (tmp_path / "2" / name).read_bytes()


def _failing_child_leaves_nothing(tmp_path: Path, failing: Writer) -> BaseException:
    (tmp_path / "b.txt").write_text("previous complete report\n")
    with pytest.raises(Exception) as caught:  # the kind is checked by the callers
        write_files([(str(tmp_path / "a.txt"), "a report", failing),
                     (str(tmp_path / "b.txt"), "b report", _pid_writer)], processes=2)
    # Nothing of the set was renamed in, no partial file is left, the old file is untouched.
    assert _files(tmp_path) == ["b.txt"]
    assert (tmp_path / "b.txt").read_text() == "previous complete report\n"
    return caught.value


def test_a_user_error_in_a_child_stays_a_user_error(tmp_path: Path) -> None:
    def disk_full(stream: TextIO) -> None:
        stream.write("half")
        raise InputError("cannot write the a report (No space left on device)", "out/a.txt")

    error = _failing_child_leaves_nothing(tmp_path, disk_full)
    assert type(error) is InputError and error.exit_code == 2
    assert error.format_message() == \
        "out/a.txt: cannot write the a report (No space left on device)"


def test_a_bug_in_a_child_is_an_internal_error_with_the_child_traceback(tmp_path: Path) -> None:
    def buggy(stream: TextIO) -> None:
        stream.write("half of a report that says PASSED")
        raise KeyError("missing metric")

    error = _failing_child_leaves_nothing(tmp_path, buggy)
    assert isinstance(error, InternalError) and error.exit_code == EXIT_INTERNAL
    assert "while writing the a report (KeyError: 'missing metric')" in error.format_message()
    assert isinstance(error.__cause__, ChildTraceback)
    assert "in buggy" in str(error.__cause__)  # --debug shows where the child failed


def test_a_child_killed_by_a_signal_is_an_internal_error(tmp_path: Path) -> None:
    def killed(stream: TextIO) -> None:
        os.kill(os.getpid(), signal.SIGKILL)  # as the out-of-memory killer would

    error = _failing_child_leaves_nothing(tmp_path, killed)
    assert isinstance(error, InternalError)
    assert f"ended by signal {int(signal.SIGKILL)}" in error.format_message()


def test_a_failure_here_kills_and_reaps_the_children(tmp_path: Path) -> None:
    """The parent's own task fails (or Ctrl-C arrives) while a child still writes: the
    child is killed and reaped at once, not waited for, and nothing is written."""
    started = tmp_path / "child.pid"

    def slow(stream: TextIO) -> None:
        started.write_text(str(os.getpid()))
        time.sleep(60)

    def interrupted(stream: TextIO) -> None:
        deadline = time.monotonic() + 20
        while not started.exists() and time.monotonic() < deadline:
            time.sleep(0.01)
        raise KeyboardInterrupt

    out = tmp_path / "out"
    begun = time.monotonic()
    with pytest.raises(KeyboardInterrupt):
        write_files([(str(out / "a.txt"), "a", slow), (str(out / "b.txt"), "b", interrupted)],
                    processes=2)
    assert time.monotonic() - begun < 30  # the 60 s child was not waited for
    child = int(started.read_text())
    with pytest.raises(ProcessLookupError):  # reaped: no such process, not even a zombie
        os.kill(child, 0)
    assert _files(out) == []


def test_run_tasks_one_after_another_when_one_process(tmp_path: Path) -> None:
    order: list[str] = []
    run_tasks([("a", lambda: order.append("a")), ("b", lambda: order.append("b"))], 1)
    assert order == ["a", "b"]


def test_no_fork_for_a_single_task(tmp_path: Path) -> None:
    seen: list[int] = []
    run_tasks([("only", lambda: seen.append(os.getpid()))], 4)
    assert seen == [os.getpid()]  # a side effect in this process: it ran here
