"""``roofgate evaluate``, ``baseline`` and ``diff`` through CliRunner: exit codes and reports."""

from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from click.testing import CliRunner

from gate import jobs
from gate.cli import cli
from gate.report.jsonout import RESULT_VERSION
from gate.report.markdown import MARKER
from gate.synth.builder import save_model
from gate.synth.scenario import SPECIES_PR_LAST_WIDTH, species, wakeword

POLICY = """\
version: 1
name: t
rules:
  - {id: params-fit, kind: fits_in_buffer, check: params, severity: error,
     remedy: split the layer or quantize its weights}
  - {id: latency-regression, kind: max_regression, metric: latency_s, max_increase_pct: 10,
     severity: warning}
"""
WAIVED_POLICY = POLICY + """\
waivers:
  - {rule: params-fit, models: ["**"], layers: ["stage4.*"],
     reason: "widening approved by the vision team",
     expires: 2026-12-31}
"""


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("gate")
    save_model(species(), root / "base" / "species.onnx")
    save_model(species(last_width=SPECIES_PR_LAST_WIDTH), root / "wide" / "species.onnx")
    save_model(wakeword(), root / "wakeword.onnx")
    renamed = species()
    for index, node in enumerate(renamed.graph.node):
        node.name = f"/exported/node_{index:03d}"
    save_model(renamed, root / "renamed" / "species.onnx")
    (root / "broken.onnx").write_bytes(b"\x08\x07garbage")
    (root / "policy.yaml").write_text(POLICY, encoding="utf-8")
    (root / "waived.yaml").write_text(WAIVED_POLICY, encoding="utf-8")
    (root / "bad.yaml").write_text("rules:\n  - {id: x, kind: nope}\n", encoding="utf-8")
    (root / "future.json").write_text(json.dumps(
        {"format": "roofgate-snapshot", "version": 99, "runs": []}), encoding="utf-8")
    return root


def _invoke(work: Path, args: list[str]):
    """Run the CLI from inside ``work`` (model paths are given relative, as in CI)."""
    old = os.getcwd()
    os.chdir(work)
    try:
        return CliRunner().invoke(cli, args)
    finally:
        os.chdir(old)


CASES = [
    ("pass", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml"], 0),
    ("error rule fails", ["evaluate", "wide/species.onnx", "-t", "ws-64x64-4mib", "-p",
                          "policy.yaml"], 1),
    ("waived before expiry", ["evaluate", "wide/species.onnx", "-t", "ws-64x64-4mib", "-p",
                              "waived.yaml", "--date", "2026-12-31"], 0),
    ("waiver expired", ["evaluate", "wide/species.onnx", "-t", "ws-64x64-4mib", "-p", "waived.yaml",
                        "--date", "2027-01-01"], 1),
    ("unanalysable model", ["evaluate", "base/species.onnx", "broken.onnx", "-t", "ws-64x64-4mib",
                            "-p", "policy.yaml"], 2),
    ("missing model", ["evaluate", "absent.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml"], 2),
    ("bad policy", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p", "bad.yaml"], 2),
    ("no target", ["evaluate", "base/species.onnx", "-p", "policy.yaml"], 2),
    ("unknown target", ["evaluate", "base/species.onnx", "-t", "nope", "-p", "policy.yaml"], 2),
    ("no policy", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib"], 2),
    ("bad date", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml",
                  "--date", "31/12/2026"], 2),
    ("newer baseline", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml",
                        "--baseline", "future.json"], 2),
    ("bad dim", ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml",
                 "--dim", "batch"], 2),
]


@pytest.mark.parametrize(("label", "args", "code"), CASES, ids=[c[0] for c in CASES])
def test_exit_codes(work, label, args, code) -> None:
    result = _invoke(work, args)
    assert result.exit_code == code, (label, result.output, result.stderr)
    assert "Traceback" not in result.output + result.stderr


def test_bad_input_is_one_clear_line(work) -> None:
    result = _invoke(work, ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p",
                            "policy.yaml", "--baseline", "future.json"])
    assert "future.json" in result.stderr and "newer roofgate" in result.stderr


def test_crash_exits_3_never_0_or_1(work, monkeypatch) -> None:
    def boom(*args, **kwargs):
        raise ZeroDivisionError("simulated bug")

    monkeypatch.setattr(jobs, "analyse", boom)
    result = _invoke(work, ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p",
                            "policy.yaml"])
    assert result.exit_code == 3
    assert "internal error" in result.stderr and "ZeroDivisionError" in result.stderr


def test_reports_hold_failures_and_unanalysable_models(work, tmp_path) -> None:
    out = tmp_path / "out"
    result = _invoke(work, [
        "evaluate", "wide/species.onnx", "broken.onnx", "-t", "ws-64x64-4mib", "-p", "policy.yaml",
        "--junit", str(out / "j.xml"), "--markdown", str(out / "s.md"),
        "--json", str(out / "r.json")])
    assert result.exit_code == 2
    root = ET.parse(out / "j.xml").getroot()
    assert root.get("failures") == "1" and root.get("errors") == "1"
    failure = root.find(".//failure")
    assert "stage4.block1.conv2" in failure.get("message")
    markdown = (out / "s.md").read_text(encoding="utf-8")
    assert markdown.startswith(MARKER) and "could not analyse** broken.onnx" in markdown
    document = json.loads((out / "r.json").read_text(encoding="utf-8"))
    assert (document["format"], document["version"], document["exit_code"]) == (
        "roofgate-result", RESULT_VERSION, 2)
    assert [e["model"] for e in document["result"]["errors"]] == ["broken.onnx"]
    assert "FAILED" in result.output and "exit 2" in result.output


def test_json_to_stdout_keeps_the_summary_on_stderr(work) -> None:
    result = _invoke(work, ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib", "-p",
                            "policy.yaml", "--json", "-"])
    assert result.exit_code == 0
    assert json.loads(result.stdout)["exit_code"] == 0
    assert "PASSED" in result.stderr


def test_baseline_is_byte_identical_and_drives_regressions(work, tmp_path) -> None:
    first, second = tmp_path / "a.json", tmp_path / "b.json"
    for path in (first, second):
        result = _invoke(work, ["baseline", "base/species.onnx", "wakeword.onnx", "-t",
                                "ws-64x64-4mib", "-t", "os-16x16-512kib", "-o", str(path)])
        assert result.exit_code == 0, result.stderr
    assert first.read_bytes() == second.read_bytes()
    assert len(json.loads(first.read_text())["runs"]) == 4
    # The widened model, gated as "base/species.onnx" against that baseline: latency warning.
    wide = work / "base" / "species.onnx"
    original = wide.read_bytes()
    try:
        wide.write_bytes((work / "wide" / "species.onnx").read_bytes())
        result = _invoke(work, ["evaluate", "base/species.onnx", "-t", "os-16x16-512kib", "-p",
                                "policy.yaml", "--baseline", str(first), "--json", "-"])
    finally:
        wide.write_bytes(original)
    document = json.loads(result.stdout)
    (entry,) = document["result"]["entries"]
    regression = next(v for v in entry["verdicts"] if v["rule_id"] == "latency-regression")
    assert regression["status"] == "fail" and entry["diff"] is not None


def test_baseline_refuses_partial_snapshots(work, tmp_path) -> None:
    path = tmp_path / "partial.json"
    result = _invoke(work, ["baseline", "base/species.onnx", "broken.onnx", "-t",
                            "ws-64x64-4mib", "-o", str(path)])
    assert result.exit_code == 2 and "no baseline written" in result.stderr
    assert not path.exists()


def test_diff_aligns_models_whose_every_node_was_renamed(work) -> None:
    result = _invoke(work, ["diff", "base/species.onnx", "renamed/species.onnx", "-t",
                            "ws-64x64-4mib"])
    assert result.exit_code == 0, result.stderr
    assert "layers: 0 added, 0 removed, 0 changed, 41 unchanged" in result.output


def test_diff_of_widened_model_lists_the_changed_layers(work, tmp_path) -> None:
    snapshot = tmp_path / "base.json"
    _invoke(work, ["baseline", "base/species.onnx", "-t", "ws-64x64-4mib", "-o", str(snapshot)])
    result = _invoke(work, ["diff", str(snapshot), "wide/species.onnx", "-t", "ws-64x64-4mib",
                            "--limit", "2", "--markdown", str(tmp_path / "d.md")])
    assert result.exit_code == 0, result.stderr
    assert "comparing base/species.onnx (old) with wide/species.onnx (new)" in result.output
    lines = result.output.splitlines()
    changed = [line for line in lines if line.strip().startswith("changed")]
    assert len(changed) == 2 and "stage4.block1.conv2" in changed[0]
    assert "(use --limit 0 for all)" in result.output
    assert (tmp_path / "d.md").read_text(encoding="utf-8").startswith(MARKER)


def test_diff_needs_targets_for_models(work) -> None:
    result = _invoke(work, ["diff", "base/species.onnx", "wide/species.onnx"])
    assert result.exit_code == 2 and "--target" in result.stderr


# --- the terminal summary the commands print ------------------------------------------

def test_terminal_summary_is_safe_and_ends_with_the_outcome() -> None:
    from gate.report import terminal
    from tests.recordkit import HOSTILE_NAME, demo_result, result

    text = terminal.render(demo_result(), ["out/j.xml", "-"])
    assert "\x1b" not in text and "\r" not in text and "\x00" not in text
    lines = text.splitlines()
    assert lines[-2] == "FAILED: 1 model(s) could not be analysed (exit 2)"
    assert lines[-1] == "reports: out/j.xml"
    assert any(line.startswith("  FAIL     models/trailcam/species.onnx") for line in lines)
    assert any("head/gemm" in line for line in lines)
    assert HOSTILE_NAME not in text  # only its escaped form can appear
    assert terminal.render(result()).splitlines()[-1] == "PASSED (exit 0)"


def test_a_bug_in_roofgate_is_exit_3_not_an_unanalysable_model(work, monkeypatch) -> None:
    from gate.errors import InternalError

    def broken(*args: object, **kwargs: object) -> None:
        raise InternalError("cost function for Conv crashed (simulated)")

    monkeypatch.setattr(jobs, "analyse", broken)
    result = _invoke(work, ["evaluate", "base/species.onnx", "-t", "ws-64x64-4mib",
                            "-p", "policy.yaml"])
    assert result.exit_code == 3 and "simulated" in result.stderr


def test_dims_are_positive_on_every_command(work) -> None:
    for command in (["evaluate", "base/species.onnx", "-p", "policy.yaml"],
                    ["baseline", "base/species.onnx", "-o", "-"],
                    ["profile", "base/species.onnx"], ["audit", "base"]):
        result = _invoke(work, [*command, "-t", "ws-64x64-4mib", "--dim", "batch=0"])
        assert result.exit_code == 2, (command, result.output)
        assert "positive integer" in result.stderr, command


def test_diff_names_both_sides_and_what_moved_on_every_changed_layer(work) -> None:
    result = _invoke(work, ["diff", "base/species.onnx", "wide/species.onnx", "-t",
                            "ws-64x64-4mib", "--limit", "0"])
    assert result.exit_code == 0, result.stderr
    lines = result.output.splitlines()
    assert lines[0] == "diff: base/species.onnx (old) -> wide/species.onnx (new)"
    assert any(line.startswith("  latency ") for line in lines)
    # head.flatten only moves activation bytes (its input doubles: 192 -> 384 channels,
    # x 4 bytes fp32), so the line says that rather than ending empty.
    flatten = next(line for line in lines if "Flatten head.flatten" in line)
    assert "input size 768 B -> 1.50 KiB (+100%)" in flatten
    conv2 = next(line for line in lines if "stage4.block1.conv2 " in line)
    assert "parameter size 1.27 MiB -> 5.06 MiB (+300%)" in conv2  # 3x3 kernels, 2x in, 2x out
