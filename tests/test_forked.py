"""Reports written side by side (gate/forked.py through gate/outfile.write_files).

After a ``-j N`` run every report file but the last is rendered in a forked child.
These tests pin what must not change with that: the bytes, the all-or-nothing rule
(a failure anywhere leaves no file of the set and no partial file), the kind of error
a child's failure becomes (exit 2 stays 2, a bug is exit 3), and that no child is
left running.
"""

from __future__ import annotations

import errno
import os
import signal
import time
from pathlib import Path
from typing import TextIO

import pytest

from gate.errors import EXIT_INTERNAL, InputError, InternalError
from gate.forked import ChildTraceback, forking_available, run_tasks
from gate.outfile import Parts, Writer, write_files

pytestmark = pytest.mark.skipif(not forking_available(), reason="side by side on Linux only")



def _pid_writer(stream: TextIO) -> None:
    stream.write(f"{os.getpid()}\n")


def _files(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_every_file_is_written_by_a_process_of_its_own(tmp_path: Path) -> None:
    paths = [tmp_path / f"{name}.txt" for name in "abc"]
    write_files([(str(p), p.stem, _pid_writer) for p in paths], processes=2)
    writers = [int(p.read_text()) for p in paths]
    assert os.getpid() not in writers
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


def _slow_writer(started: Path) -> Writer:
    def slow(stream: TextIO) -> None:
        started.write_text(str(os.getpid()))
        time.sleep(60)
    return slow


def _wait_for(path: Path) -> None:
    deadline = time.monotonic() + 20
    while not path.exists() and time.monotonic() < deadline:
        time.sleep(0.01)


def _assert_reaped(started: Path) -> None:
    child = int(started.read_text())
    with pytest.raises(ProcessLookupError):  # reaped: no such process, not even a zombie
        os.kill(child, 0)


def test_ctrl_c_here_kills_and_reaps_the_children(tmp_path: Path) -> None:
    """Ctrl-C arrives while this process prepares the next file (a file in parts is
    prepared here) and a child still writes: the child is killed and reaped at once, not
    waited for, and nothing is written."""
    started = tmp_path / "child.pid"

    def interrupted(count: int) -> list[Writer]:
        _wait_for(started)
        raise KeyboardInterrupt

    out = tmp_path / "out"
    begun = time.monotonic()
    with pytest.raises(KeyboardInterrupt):
        write_files([(str(out / "a.txt"), "a", _slow_writer(started)),
                     (str(out / "b.txt"), "b", Parts(interrupted))], processes=2)
    assert time.monotonic() - begun < 30  # the 60 s child was not waited for
    _assert_reaped(started)
    assert _files(out) == []


def test_a_failing_child_does_not_wait_for_a_slower_one(tmp_path: Path) -> None:
    """The first failure to happen ends the run at once, even when an earlier child is
    still writing: it is killed and reaped."""
    started = tmp_path / "child.pid"

    def failing(stream: TextIO) -> None:
        _wait_for(started)
        raise ValueError("renderer failed")

    out = tmp_path / "out"
    begun = time.monotonic()
    with pytest.raises(InternalError, match="renderer failed"):
        write_files([(str(out / "a.txt"), "a", _slow_writer(started)),
                     (str(out / "b.txt"), "b", failing)], processes=2)
    assert time.monotonic() - begun < 30
    _assert_reaped(started)
    assert _files(out) == []


def test_run_tasks_one_after_another_when_one_process(tmp_path: Path) -> None:
    order: list[str] = []
    run_tasks([("a", lambda: order.append("a")), ("b", lambda: order.append("b"))], 1)
    assert order == ["a", "b"]


def test_a_file_in_parts_is_its_parts_joined_whatever_the_processes(tmp_path: Path) -> None:
    """``Parts``: the writers are asked for once, here; each part is written by a process
    of its own (with -j N) into its own partial file, and the file is the parts joined."""
    asked: list[int] = []

    def writers(count: int) -> list[Writer]:
        asked.append(count)

        def part(k: int) -> Writer:
            # several MiB per part: larger than one kernel copy round or pipe buffer
            return lambda stream: stream.writelines(f"part {k} row {r} \u00e9\n"
                                                    for r in range(100_000))
        return [part(k) for k in range(count)]

    texts = {}
    for processes in (1, 2, 3):
        target = tmp_path / f"j{processes}.txt"
        write_files([(str(target), "parted", Parts(writers)),
                     (str(tmp_path / f"other{processes}.txt"), "other", "text\n")], processes)
        texts[processes] = target.read_text(encoding="utf-8")
        expected = "".join(f"part {k} row {r} \u00e9\n" for k in range(processes)
                           for r in range(100_000))
        assert texts[processes] == expected
    assert asked == [1, 2, 3]
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "j1.txt", "j2.txt", "j3.txt", "other1.txt", "other2.txt", "other3.txt"]  # no partials


def test_a_failing_part_leaves_no_file_of_the_set(tmp_path: Path) -> None:
    def writers(count: int) -> list[Writer]:
        def broken(stream: TextIO) -> None:
            stream.write("half")
            raise ValueError("part failed")
        return [lambda stream: stream.write("first part\n"), broken]

    with pytest.raises(InternalError, match="part failed"):
        write_files([(str(tmp_path / "a.txt"), "a report", Parts(writers)),
                     (str(tmp_path / "b.txt"), "b report", "text\n")], processes=2)
    assert _files(tmp_path) == []


def test_appending_without_the_kernel_copy_gives_the_same_bytes(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Where copy_file_range is missing (or refuses: another file system, an old kernel),
    parts are joined by reading and writing."""
    from gate import outfile

    def unsupported(*args: object) -> int:
        raise OSError(errno.ENOSYS, "Function not implemented")

    monkeypatch.setattr(os, "copy_file_range", unsupported)
    data = bytes(range(256)) * 10_000
    source, target = tmp_path / "source", tmp_path / "target"
    source.write_bytes(data)
    target.write_bytes(b"head:")
    with open(source, "rb") as src, open(target, "ab") as dst:
        outfile._append(dst.fileno(), src.fileno())
    assert target.read_bytes() == b"head:" + data


def test_the_json_report_is_rendered_in_shares_by_processes_of_their_own(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """With -j 2 the JSON report is cut between entries and each share rendered by its own
    process; the file is byte for byte the one -j 1 writes (and so are the others)."""
    from gate import jsontext
    from gate.report import jsonout, write_reports
    from tests.recordkit import demo_result

    seen = tmp_path / "shares.txt"
    share_of = jsontext.canonical_json_share

    def recorded(document, items, share, *, first, last):
        with open(seen, "a", encoding="utf-8") as log:
            log.write(f"{os.getpid()} {share.start}-{share.stop}\n")
        return share_of(document, items, share, first=first, last=last)

    monkeypatch.setattr(jsonout, "canonical_json_share", recorded)
    result = demo_result()
    assert len(result.entries) >= 2
    written = {}
    for processes in (1, 2):
        folder = tmp_path / f"j{processes}"
        write_reports(result, {"json": str(folder / "r.json"), "junit": str(folder / "j.xml"),
                               "markdown": str(folder / "s.md")}, processes=processes)
        written[processes] = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert written[1] == written[2]
    shares = seen.read_text().split("\n")[:-1]  # only -j 2 renders in shares
    pids = {line.split()[0] for line in shares}
    assert len(shares) == 2 and len(pids) == 2 and str(os.getpid()) not in pids


def test_one_after_another_while_another_thread_runs(tmp_path: Path) -> None:
    """roofgate used as a library in a threaded program: no fork beside another thread."""
    import threading

    stop = threading.Event()
    other = threading.Thread(target=stop.wait)
    other.start()
    try:
        assert not forking_available()
        paths = [tmp_path / f"{name}.txt" for name in "ab"]
        write_files([(str(p), p.stem, _pid_writer) for p in paths], processes=2)
        assert {int(p.read_text()) for p in paths} == {os.getpid()}
    finally:
        stop.set()
        other.join()
    assert forking_available()


def test_a_long_failure_message_still_fits_the_pipe() -> None:
    """The child reports its failure in one write that must not wait for the parent (a
    pipe holds 64 KiB): even the longest message, every character escaped, fits."""
    from gate import forked

    huge = "\u2028" * 100_000  # each escaped as \u2028: 6 bytes
    for exc in (InputError(huge, huge), RuntimeError(huge)):
        message = forked._describe(exc)
        assert len(message) <= forked._MESSAGE_BYTES
        error = forked._failure("json report", message)
        assert "\u2028" in error.message or "RuntimeError" in error.message
