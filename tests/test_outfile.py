"""The output-file owner: stdout for '-', streams written into, folders created, no
half-written file left behind."""

from __future__ import annotations

import os
import stat
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from gate.errors import InputError
from gate.outfile import (
    BLOCK_DEVICE,
    STREAM,
    check_output_paths,
    open_output,
    remove_stale,
    stream_kind,
)


def test_writes_into_new_folders(tmp_path: Path) -> None:
    target = tmp_path / "a" / "b" / "report.txt"
    with open_output(str(target), "report") as stream:
        stream.write("done\n")
    assert target.read_text() == "done\n"
    assert [p.name for p in target.parent.iterdir()] == ["report.txt"]


def test_failure_leaves_neither_partial_nor_target(tmp_path: Path) -> None:
    target = tmp_path / "report.txt"
    with pytest.raises(RuntimeError), open_output(str(target), "report") as stream:
        stream.write("half")
        raise RuntimeError("reporter bug")
    assert list(tmp_path.iterdir()) == []


def test_failure_keeps_the_previous_complete_file(tmp_path: Path) -> None:
    target = tmp_path / "report.txt"
    target.write_text("yesterday\n")
    with pytest.raises(RuntimeError), open_output(str(target), "report") as stream:
        stream.write("half")
        raise RuntimeError("reporter bug")
    assert target.read_text() == "yesterday\n"


def test_unwritable_place_is_one_input_error(tmp_path: Path) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with (pytest.raises(InputError, match="cannot write the snapshot"),
          open_output(str(blocker / "inside.json"), "snapshot") as stream):
        stream.write("{}")


def test_dash_is_stdout(capsys: pytest.CaptureFixture[str]) -> None:
    with open_output("-", "report") as stream:
        stream.write("to the terminal\n")
    assert capsys.readouterr().out == "to the terminal\n"


def test_a_writer_streams_into_the_file_and_a_failing_one_leaves_no_file_of_the_set(
        tmp_path: Path) -> None:
    from gate.outfile import write_files

    def pieces(stream) -> None:
        for k in range(3):
            stream.write(f"piece {k}\n")

    def broken(stream) -> None:
        stream.write("half of a report that says PASSED")
        raise RuntimeError("renderer failed")

    write_files([(str(tmp_path / "a.txt"), "a", "text\n"),
                 (str(tmp_path / "b.txt"), "b", pieces)])
    assert (tmp_path / "b.txt").read_text() == "piece 0\npiece 1\npiece 2\n"
    with pytest.raises(RuntimeError, match="renderer failed"):
        write_files([(str(tmp_path / "c.txt"), "c", "complete\n"),
                     (str(tmp_path / "d.txt"), "d", broken)])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "b.txt"]  # no partials


def test_stdout_takes_text_not_a_writer(tmp_path: Path) -> None:
    from gate.outfile import write_files

    with pytest.raises(TypeError, match="stdout takes text"):
        write_files([(str(tmp_path / "a.txt"), "a", "text\n"), ("-", "b", lambda s: None)])
    assert not list(tmp_path.iterdir())  # refused before anything was written


# --- streams: devices, pipes, /dev/stdout --------------------------------------------
# A path that names a stream is written into, never removed or replaced. Replacing one
# as root (CI containers run as root) once turned /dev/null into a regular file. These
# tests use named pipes in tmp_path and /proc/self/fd/N, never a shared /dev node, so a
# regression fails the test (nothing can be created in /proc) without breaking the machine.

needs_fifo = pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are POSIX")
needs_proc = pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="Linux /proc")


class _Reader:
    """Reads a named pipe to its end in a thread (a writer's open blocks until a reader comes)."""

    def __init__(self, fifo: Path) -> None:
        self.data = b""
        self.thread = threading.Thread(target=self._read, args=(fifo,), daemon=True)
        self.thread.start()

    def _read(self, fifo: Path) -> None:
        with open(fifo, "rb") as stream:
            self.data = stream.read()

    def text(self) -> str:
        self.thread.join(timeout=30)
        assert not self.thread.is_alive(), "the pipe was never closed by its writer"
        return self.data.decode("utf-8")


@needs_fifo
def test_a_named_pipe_is_written_into_and_stays_a_pipe(tmp_path: Path) -> None:
    from gate.outfile import Parts, write_files

    fifo = tmp_path / "report.pipe"
    os.mkfifo(fifo)
    assert stream_kind(str(fifo)) == STREAM
    remove_stale([str(fifo)])  # an earlier run's report: a pipe is not one
    for content in ("whole text\n", lambda s: s.write("whole text\n"),
                    Parts(lambda n: [lambda s: s.write("whole "), lambda s: s.write("text\n")])):
        reader = _Reader(fifo)
        write_files([(str(tmp_path / "a.txt"), "a", "file\n"), (str(fifo), "b", content)],
                    processes=2)
        assert reader.text() == "whole text\n"
        assert stat.S_ISFIFO(os.lstat(fifo).st_mode)
        assert (tmp_path / "a.txt").read_text() == "file\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "report.pipe"]


@needs_fifo
def test_a_failing_renderer_writes_nothing_into_a_pipe(tmp_path: Path) -> None:
    """A stream cannot be unwritten, so its text is rendered whole first: a renderer that
    fails halfway leaves the pipe unopened (no reader needed) and no file of the set."""
    from gate.outfile import write_files

    fifo = tmp_path / "report.pipe"
    os.mkfifo(fifo)

    def broken(stream) -> None:
        stream.write("half of a report that says PASSED")
        raise RuntimeError("renderer failed")

    with pytest.raises(RuntimeError, match="renderer failed"):
        write_files([(str(tmp_path / "a.txt"), "a", "complete\n"), (str(fifo), "b", broken)])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.pipe"]


@needs_fifo
def test_a_link_in_the_working_tree_to_a_pipe_is_replaced_not_written_through(
        tmp_path: Path) -> None:
    """Only links in /dev and /proc are streams: a link a pull request could commit is
    replaced like any file (the pipe it points to is left alone: no reader ever comes)."""
    from gate.outfile import write_text

    fifo = tmp_path / "elsewhere.pipe"
    os.mkfifo(fifo)
    link = tmp_path / "out" / "result.json"
    link.parent.mkdir()
    link.symlink_to(fifo)
    assert stream_kind(str(link)) is None
    write_text(str(link), "{}\n", "json report")
    assert not link.is_symlink() and link.read_text() == "{}\n"
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)


def test_devices_and_their_links_are_streams_and_disks_are_refused(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    for device in ("/dev/null", "/dev/stdout"):
        if os.path.exists(device):
            assert stream_kind(device) == STREAM, device
    assert stream_kind(str(tmp_path / "new.json")) is None
    assert stream_kind(str(tmp_path)) is None
    disks = [f"/dev/{n}" for n in sorted(os.listdir("/dev"))
             if stat.S_ISBLK(os.lstat(f"/dev/{n}").st_mode)] if os.path.isdir("/dev") else []
    if disks:
        assert stream_kind(disks[0]) == BLOCK_DEVICE
    # the refusal itself, whether or not this machine shows a disk
    import gate.outfile

    monkeypatch.setattr(gate.outfile, "stream_kind", lambda path: BLOCK_DEVICE)
    with pytest.raises(InputError, match="block device"):
        check_output_paths({"json report": "/dev/sdz9"}, gate.outfile.TYPED_PATHS)


@needs_fifo
def test_two_reports_may_share_a_stream_but_not_a_file(tmp_path: Path) -> None:
    from gate.outfile import TYPED_PATHS

    fifo = tmp_path / "both.pipe"
    os.mkfifo(fifo)
    check_output_paths({"json report": str(fifo), "junit report": str(fifo)}, TYPED_PATHS)
    with pytest.raises(InputError, match="same file"):
        check_output_paths({"json report": str(tmp_path / "r"),
                            "junit report": str(tmp_path / "r")}, TYPED_PATHS)


@needs_proc
def test_a_stream_is_appended_to_and_a_full_device_is_one_input_error(tmp_path: Path) -> None:
    """/proc/self/fd/N (what /dev/stdout and bash's >(...) resolve to): a file behind it
    is appended to, not overwritten from its start; a full device is exit 2, one line."""
    from gate.outfile import write_text

    held = tmp_path / "stdout.txt"
    with open(held, "w") as stream:
        stream.write("summary printed before\n")
        stream.flush()
        write_text(f"/proc/self/fd/{stream.fileno()}", "the report\n", "json report")
    assert held.read_text() == "summary printed before\nthe report\n"
    if os.path.exists("/dev/full"):
        with (open("/dev/full", "w") as full,
              pytest.raises(InputError, match=r"cannot write the json report \(No space")):
            write_text(f"/proc/self/fd/{full.fileno()}", "x" * 100_000, "json report")
        assert stat.S_ISCHR(os.stat("/dev/full").st_mode)


@needs_proc
def test_audit_json_to_its_own_stdout_keeps_the_summary_out_of_the_report(
        tmp_path: Path) -> None:
    """``--json /proc/self/fd/1`` (like /dev/stdout) with stdout in a file: the file holds
    the JSON report alone, the summary goes to stderr, as with ``--json -``."""
    import json

    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    b = NetBuilder("fc")
    b.output(b.gemm(b.input("x", [1, 16]), 8, name="fc"))
    save_model(b.build(), tmp_path / "zoo/m.onnx")
    out = tmp_path / "stdout.txt"
    with open(out, "w") as stdout:
        done = subprocess.run([sys.executable, "-c", "from gate.cli import main; main()",
                               "audit", "zoo", "-t",
                               "ws-64x64-4mib", "-p", "default", "-j", "2",
                               "--json", "/proc/self/fd/1"],
                              cwd=tmp_path, stdout=stdout, stderr=subprocess.PIPE, text=True,
                              timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    assert json.loads(out.read_text())["summary"]["status"] == "passed"
    assert "PASSED (exit 0)" in done.stderr
    # stdout and the report both discarded (the null device): the summary is not moved
    quiet = subprocess.run([sys.executable, "-c", "from gate.cli import main; main()",
                            "audit", "zoo", "-t", "ws-64x64-4mib", "-p", "default",
                            "--junit", "/proc/self/fd/1"],
                           cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                           text=True, timeout=120, check=False)
    assert quiet.returncode == 0 and "PASSED" not in quiet.stderr, quiet.stderr


@needs_fifo
def test_audit_writes_a_report_into_a_named_pipe_at_j2(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    from click.testing import CliRunner

    from gate.cli import cli
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    for k in range(3):
        b = NetBuilder("fc")
        b.output(b.gemm(b.input("x", [1, 16]), 8 + k, name="fc"))
        save_model(b.build(), tmp_path / f"zoo/m{k}.onnx")
    fifo = tmp_path / "junit.pipe"
    os.mkfifo(fifo)
    monkeypatch.chdir(tmp_path)
    reader = _Reader(fifo)
    done = CliRunner().invoke(cli, ["audit", "zoo", "-t", "ws-64x64-4mib", "-p", "default",
                                    "-j", "2", "--junit", str(fifo), "--json", "r.json"])
    assert done.exit_code == 0, done.output
    assert reader.text().count("<testcase") >= 3
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode) and (tmp_path / "r.json").is_file()
