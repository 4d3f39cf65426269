"""One analysis path: every command analyses through gate.jobs, reads roofgate.yaml, and
maps a bug in roofgate to exit 3 whatever the policy allows.

The crash is simulated by monkeypatching the cost function the analysis path calls
(``gate.costmodel.cost_model``), in-process (``-j 1``); the worker-process mapping is
tested in test_audit.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from gate import costmodel
from gate.cli import cli
from gate.diff import diff_runs
from gate.policy.regression import _layer_pairs
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import Repo, repo_with_a_change

TARGET = "ws-64x64-4mib"
POLICY = """\
version: 1
name: t
allow_unanalysable: {allow}
rules:
  - {{id: params-fit, kind: fits_in_buffer, check: params}}
"""


def fc_model(out_features: int, *, in_features: int = 256, name: str = "fc"):
    b = NetBuilder("fc", weights="external")
    x = b.input("x", [1, in_features])
    b.output(b.gemm(x, out_features, name=name))
    return b.build()


def invoke(args: list[str]):
    return CliRunner().invoke(cli, args)


@pytest.fixture(params=["false", "true"], ids=["strict", "allow_unanalysable"])
def repo(request, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Repo:
    repo = repo_with_a_change(
        tmp_path / "repo", {"roofgate.yaml": f"targets: [{TARGET}]\npolicies: [policies/p.yaml]\n",
                            "policies/p.yaml": POLICY.format(allow=request.param)},
        "models/a.onnx", fc_model(64), fc_model(96))
    monkeypatch.chdir(repo.path)
    return repo


COMMANDS = {
    "profile": ["profile", "models/a.onnx"],
    "evaluate": ["evaluate", "models/a.onnx"],
    "baseline": ["baseline", "models/a.onnx", "-o", "snap.json"],
    "diff": ["diff", "models/a.onnx", "models/a.onnx"],
    "check": ["check", "--base", "main"],
    "audit": ["audit", "-j", "1"],
}


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_a_bug_in_a_cost_function_exits_3_in_every_command_under_every_policy(
        repo: Repo, monkeypatch: pytest.MonkeyPatch, command: str) -> None:
    """allow_unanalysable lets unanalysable models through, never roofgate's own bugs."""
    def crash(*args: object, **kwargs: object) -> None:
        raise ZeroDivisionError("simulated bug in a cost function")

    monkeypatch.setattr(costmodel, "cost_model", crash)
    result = invoke(COMMANDS[command])
    assert result.exit_code == 3, (command, result.output, result.stderr)
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith("Error: internal error") and "ZeroDivisionError" in line, line
    assert "--debug" in line
    assert not (repo.path / "roofgate-out/junit.xml").exists()  # no report reads as a verdict


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_every_command_reads_roofgate_yaml(repo: Repo, command: str) -> None:
    """No --target anywhere: the targets (and policies) come from roofgate.yaml."""
    result = invoke(COMMANDS[command])
    assert result.exit_code in (0, 1), (command, result.output, result.stderr)
    if command in ("profile", "evaluate", "check", "audit", "diff"):
        assert TARGET in result.output, (command, result.output)


def test_the_config_is_found_from_a_subfolder_and_flags_replace_it(repo: Repo,
                                                                  monkeypatch) -> None:
    monkeypatch.chdir(repo.path / "models")
    found = invoke(["profile", "a.onnx"])
    assert found.exit_code == 0 and TARGET in found.output, found.output
    replaced = invoke(["profile", "a.onnx", "-t", "os-16x16-512kib"])
    assert replaced.exit_code == 0, replaced.output
    assert "os-16x16-512kib" in replaced.output and TARGET not in replaced.output


def test_evaluate_without_any_policy_is_exit_2_with_the_remedy(tmp_path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    save_model(fc_model(64), tmp_path / "m.onnx")
    result = invoke(["evaluate", "m.onnx", "-t", TARGET])
    assert result.exit_code == 2
    (line,) = result.stderr.strip().splitlines()
    assert "no policy applies" in line and "-p default" in line and "policies:" in line


def test_help_lists_commands_in_workflow_order() -> None:
    text = invoke(["--help"]).output
    listed = [line.split()[0] for line in text.split("Commands:")[1].splitlines()
              if line.startswith("  ")]
    assert listed[:3] == ["check", "audit", "merge"], listed
    assert "evaluate" in listed and "gate" not in listed


def test_regression_rules_and_diffs_pair_layers_alike(tmp_path: Path) -> None:
    """One matcher: without a diff given, the regression rule pairs layers exactly as the
    diff does (a renamed layer is paired by signature, not dropped)."""
    from gate.jobs import analyse
    from gate.policy.load import load_policy
    from gate.targets import load_target

    save_model(fc_model(64, name="old_name"), tmp_path / "base.onnx")
    save_model(fc_model(64, name="new_name"), tmp_path / "head.onnx")
    target = [load_target(TARGET)]
    (base,) = analyse(str(tmp_path / "base.onnx"), target, shown_path="m.onnx")
    (head,) = analyse(str(tmp_path / "head.onnx"), target, shown_path="m.onnx")
    (tmp_path / "p.yaml").write_text(
        "version: 1\nname: r\nrules:\n  - {id: lat, kind: max_regression, metric: latency_s, "
        "level: layer, max_increase_pct: 5}\n")
    rule = load_policy(str(tmp_path / "p.yaml")).rules[0]
    with_diff = _layer_pairs(rule, head, base, diff_runs(base, head))
    without = _layer_pairs(rule, head, base, None)
    assert with_diff == without and len(without) == 1
    assert without[0].layer == "new_name" and "was 'old_name'" in without[0].label
