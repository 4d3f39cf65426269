"""`roofgate demo`: builds the fictional repository, fails the gate as designed, exits 0.

Its run time is measured in bench/run.py (benchmark 6), not here."""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from gate.cli import cli
from gate.demo import WIDENED_LAYER, outcome_problems
from tests.recordkit import demo_result, result


def test_demo_runs_as_designed(tmp_path: Path) -> None:
    done = CliRunner().invoke(cli, ["demo", "--keep", str(tmp_path / "demo")])
    assert done.exit_code == 0, done.output
    out = done.stdout
    assert "FICTIONAL" in out and "As designed, the gate FAILED" in out
    assert WIDENED_LAYER in out and "models/trailcam/species.onnx" in out
    reports = tmp_path / "demo" / "fernhollow-models" / "roofgate-out"
    junit = (reports / "junit.xml").read_text(encoding="utf-8")
    assert WIDENED_LAYER in junit and "<failure" in junit
    assert (reports / "summary.md").is_file() and (reports / "result.json").is_file()
    assert f"reports in {reports}/: junit.xml" in out  # says where the reports are
    assert f"comment it would post: {reports / 'summary.md'}" in out
    # The failing layer with its value, the buffer it exceeds and the remedy (from the
    # scenario: 384 x 384 x 3 x 3 fp32 weights = 5,308,416 bytes = 5.06 MiB; 4 MiB buffer).
    assert ("rule params-fit-buffer fails at layer stage4.block1.conv2: parameter size "
            "5.06 MiB, above the limit of 4.00 MiB. Fix: split the layer") in out
    # what blocked is the first thing after the headline
    lines = out.splitlines()
    title = next(k for k, line in enumerate(lines) if line.startswith("roofgate check:"))
    assert lines[title + 1] == "BLOCKED by 1 rule:"
    # The pruned wake-word model is called an improvement, with its parameter change.
    wake = next(line for line in out.splitlines() if "wakeword.onnx on" in line)
    assert wake.startswith("  PASS") and wake.endswith("improved")
    assert "shown as improved, parameters 2.38 MiB -> 984 KiB (-59.6%)" in out
    # Only the model with a symbolic length is bound: no "binding ignored" note elsewhere.
    summary = (reports / "summary.md").read_text(encoding="utf-8")
    assert "binding ignored" not in summary
    assert "FICTIONAL demo data" in summary  # the reports are labelled, not only the console


def test_demo_refuses_a_non_empty_folder(tmp_path: Path) -> None:
    (tmp_path / "x").write_text("keep me")
    done = CliRunner().invoke(cli, ["demo", "--keep", str(tmp_path)])
    assert done.exit_code == 2 and "not empty" in done.stderr
    assert (tmp_path / "x").read_text() == "keep me"


def test_outcome_check_notices_a_demo_that_went_wrong() -> None:
    assert outcome_problems(result())  # a passing, empty run is not the designed outcome
    problems = outcome_problems(demo_result())  # hand-made: fails on another layer name
    assert any(WIDENED_LAYER in p for p in problems)


def test_demo_accepts_a_relative_keep_folder(tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    # The check runs inside the demo repository; a relative --keep must still find its config.
    monkeypatch.chdir(tmp_path)
    done = CliRunner().invoke(cli, ["demo", "--keep", "rel"])
    assert done.exit_code == 0, done.output
    assert (tmp_path / "rel" / "fernhollow-models" / "roofgate-out" / "junit.xml").is_file()
