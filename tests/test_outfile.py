"""The output-file owner: stdout for '-', folders created, no half-written file left behind."""

from __future__ import annotations

from pathlib import Path

import pytest

from gate.errors import InputError
from gate.outfile import open_output


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
