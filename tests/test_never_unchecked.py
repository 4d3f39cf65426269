"""Never pass what was not checked: every way found to get a green run with nothing checked.

Each case runs the public CLI (click's CliRunner) and asserts the exit code and the
one-line message (README, "Exit codes": 1 a rule failed or a model was not gated,
2 bad input or configuration). Models are built in code (gate.synth, tests/loadkit).
"""

from __future__ import annotations

import os
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gate.cli import cli
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import Repo
from tests.loadkit import save, small_cnn

TARGET = "ws-64x64-4mib"
OTHER_TARGET = "os-16x16-512kib"
POLICY = """\
version: 1
name: t
{policy_extra}rules:
  - id: params-fit
    kind: fits_in_buffer
    check: params
{rule_extra}"""
CONFIG = f"""\
targets: [{TARGET}]
policies: [policies/p.yaml]
models:
  - paths: ["models/**/*.onnx"]
"""


def fc_model(out_features: int, *, in_features: int = 256):
    b = NetBuilder("fc", weights="external")
    b.output(b.gemm(b.input("x", [1, in_features]), out_features, name="fc"))
    return b.build()


def invoke(args: list[str]):
    return CliRunner().invoke(cli, args)


def one_line(result) -> str:
    """The one message line on stderr (progress lines of audit aside)."""
    lines = [line for line in result.stderr.strip().splitlines()
             if not line.startswith("roofgate audit: [")]
    assert len(lines) == 1, result.stderr
    return lines[0]


def write(root: Path, path: str, text: str) -> None:
    (root / path).parent.mkdir(parents=True, exist_ok=True)
    (root / path).write_text(text, encoding="utf-8")


@pytest.fixture()
def zoo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    root = tmp_path / "zoo"
    write(root, "roofgate.yaml", CONFIG)
    write(root, "policies/p.yaml", POLICY.format(policy_extra="", rule_extra=""))
    save_model(fc_model(64), root / "models/a.onnx")
    monkeypatch.chdir(root)
    return root


@pytest.fixture()
def repo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Repo:
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", CONFIG)
    repo.write("policies/p.yaml", POLICY.format(policy_extra="", rule_extra=""))
    save_model(fc_model(64), repo.path / "models/a.onnx")
    repo.commit("base")
    repo.branch("pr")
    monkeypatch.chdir(repo.path)
    return repo


# --- a glob typo ---------------------------------------------------------------------

def test_a_model_glob_that_matches_nothing_is_exit_2_naming_the_glob(repo: Repo) -> None:
    repo.write("roofgate.yaml", CONFIG.replace('"models/**/*.onnx"', '"model/**/*.onnx"'))
    repo.commit("typo on the target branch")  # check reads its rules at the merge base
    repo.git("branch", "-f", "main")
    save_model(fc_model(4096), repo.path / "models/a.onnx")  # +1000%: must not pass
    repo.commit("typo and a regression")
    for args in (["check", "--base", "main"], ["audit"]):
        result = invoke(args)
        assert result.exit_code == 2, (args, result.output)
        line = one_line(result)
        assert "glob 'model/**/*.onnx' matches no file" in line, line
        assert "did you mean 'models/**/*.onnx'?" in line and "roofgate.yaml" in line


def test_an_ungated_glob_that_matches_nothing_is_exit_2(zoo: Path) -> None:
    write(zoo, "roofgate.yaml", CONFIG + "ungated: ['third_party/*.onnx']\n")
    result = invoke(["audit"])
    assert result.exit_code == 2 and "ungated: glob 'third_party/*.onnx'" in one_line(result)


# --- a changed model outside every group ---------------------------------------------

def test_a_changed_model_outside_every_group_fails_check(repo: Repo) -> None:
    save_model(fc_model(4096), repo.path / "exported/big.onnx")
    repo.commit("a model outside every group")
    result = invoke(["check", "--base", "main"])
    assert result.exit_code == 1, result.output
    assert "  NOT GATED exported/big.onnx: no model group of roofgate.yaml covers it" in \
        result.output
    assert result.output.splitlines()[-2].startswith("FAILED: 1 changed model(s) not gated")


def test_an_lfs_pointer_outside_every_group_is_not_gated_either(repo: Repo) -> None:
    repo.write("weights/big.onnx", "version https://git-lfs.github.com/spec/v1\n"
               "oid sha256:" + "0" * 64 + "\nsize 123\n")
    repo.commit("an LFS pointer outside every group")
    result = invoke(["check", "--base", "main"])
    assert result.exit_code == 1 and "NOT GATED weights/big.onnx" in result.output


def test_audit_lists_stray_models_and_skips_ungated_ones(zoo: Path) -> None:
    save_model(fc_model(64), zoo / "scratch/b.onnx")
    result = invoke(["audit"])
    assert result.exit_code == 1 and "NOT GATED scratch/b.onnx" in result.output
    write(zoo, "roofgate.yaml", CONFIG + "ungated: ['scratch/*.onnx']\n")
    result = invoke(["audit"])
    assert result.exit_code == 0, result.output
    assert "SKIPPED  scratch/b.onnx: skipped: listed under 'ungated:'" in result.output


def test_a_folder_audit_cannot_list_is_exit_2_not_skipped(zoo: Path,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """A folder of models the runner may not read (a mount with other owners, a cache
    dir) was skipped without a word by the walk (pathlib's rglob passes over
    PermissionError), and the audit passed on the rest. The tests run as root, which
    reads everything, so the denial is simulated where the walk lists a folder."""
    save_model(fc_model(64), zoo / "models/locked/b.onnx")
    real_scandir = os.scandir

    def scandir(path):  # type: ignore[no-untyped-def]
        if str(path).endswith("locked"):
            raise PermissionError(13, "Permission denied", str(path))
        return real_scandir(path)

    assert invoke(["audit"]).exit_code == 0  # the control: readable, both models pass
    monkeypatch.setattr(os, "scandir", scandir)
    result = invoke(["audit"])
    assert result.exit_code == 2, result.output
    line = one_line(result)
    assert "models/locked" in line and "cannot list this folder (Permission denied)" in line
    assert "would go unchecked" in line, line


def test_a_model_whose_graph_has_no_nodes_is_exit_2_not_a_pass(zoo: Path) -> None:
    """A graph with no node (its input wired straight to its output: an export that lost
    the network) cost 0 s and 0 J, and every rule passed it. The control: a graph of one
    Identity, which really costs nothing, still passes."""
    import onnx
    from onnx import TensorProto, helper

    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 16])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 16])
    opset = [helper.make_opsetid("", 17)]
    onnx.save(helper.make_model(helper.make_graph([], "lost", [x], [x]), opset_imports=opset),
              zoo / "models/lost.onnx")
    onnx.save(helper.make_model(helper.make_graph([helper.make_node("Identity", ["x"], ["y"])],
                                                  "wire", [x], [y]), opset_imports=opset),
              zoo / "models/wire.onnx")
    result = invoke(["audit"])
    assert result.exit_code == 2, result.output
    assert "ERROR  models/lost.onnx: the model's graph has no nodes" in result.output
    assert "PASS     models/wire.onnx" in result.output
    profiled = invoke(["profile", "models/lost.onnx", "-t", TARGET])
    assert profiled.exit_code == 2 and "graph has no nodes" in one_line(profiled)


def test_an_input_declared_with_size_0_is_unknown_not_a_model_without_work(
        zoo: Path) -> None:
    """An input whose batch axis was exported as 0 (an empty tensor) cost 0 MACs, and
    every rule passed it. Now the axis is unknown, as -1 is: not costed (exit 1) until
    --shape sizes it, and then the MatMul's MACs are counted (1 x 256 x 128)."""
    import json

    import onnx
    from onnx import TensorProto, helper, numpy_helper

    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [0, 256])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [0, 128])
    weight = numpy_helper.from_array(np.ones((256, 128), np.float32), "W")
    graph = helper.make_graph([helper.make_node("MatMul", ["x", "W"], ["y"], name="mm")],
                              "empty_batch", [x], [y], initializer=[weight])
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
              zoo / "models/a.onnx")
    result = invoke(["audit"])
    assert result.exit_code == 1 and "not costed" in result.output, result.output
    profiled = invoke(["profile", "models/a.onnx", "-t", TARGET])
    assert "input 'x' declares size 0 on axis 0" in profiled.output + profiled.stderr
    sized = invoke(["profile", "models/a.onnx", "-t", TARGET, "--shape", "x=1x256",
                    "--format", "json"])
    assert sized.exit_code == 0, sized.output
    layer = json.loads(sized.stdout)["targets"][0]["layers"][0]
    assert layer["metrics"]["macs"] == 256 * 128


def test_audit_of_a_folder_without_models_is_exit_2_not_a_pass(zoo: Path) -> None:
    """``audit PATH`` on a folder holding no model (a wrong path, models not downloaded
    yet) checked nothing and passed; a shard left empty by the deal still passes, since
    the merge covers the zoo."""
    (zoo / "downloads").mkdir()
    write(zoo, "downloads/README.md", "models land here\n")
    result = invoke(["audit", "downloads"])
    assert result.exit_code == 2, result.output
    assert "no model to audit under downloads" in one_line(result)
    assert not (zoo / "roofgate-out" / "result.json").exists()
    empty_shard = invoke(["audit", "--shard", "2/2", "--shard-out", "s2.json"])
    assert empty_shard.exit_code == 0, empty_shard.output  # one model: shard 2 gets none


# --- a policy or rule scope typo -------------------------------------------------------

SCOPE_TYPOS = {
    "policy targets": ("targets: [ws-64x64-4mb]\n", "", "targets: 'ws-64x64-4mb'",
                       "did you mean 'ws-64x64-4mib'?"),
    "rule targets": ("", "    targets: [ws-64x64-4mb]\n", "targets: 'ws-64x64-4mb'",
                     "did you mean 'ws-64x64-4mib'?"),
    "rule models": ("", "    models: ['model/**']\n", "models: 'model/**'", "matches no model"),
    "rule op types": ("", "    level: layer\n    op_types: [Gem]\n", "op_types: 'Gem'",
                      "did you mean 'Gemm'?"),
}


@pytest.mark.parametrize("case", sorted(SCOPE_TYPOS))
@pytest.mark.parametrize("command", ["audit", "evaluate"])
def test_a_scope_that_matches_nothing_is_exit_2_with_did_you_mean(zoo: Path, case: str,
                                                                  command: str) -> None:
    policy_extra, rule_extra, quoted, hint = SCOPE_TYPOS[case]
    write(zoo, "policies/p.yaml", POLICY.format(policy_extra=policy_extra, rule_extra=rule_extra))
    args = ["audit"] if command == "audit" else ["evaluate", "models/a.onnx"]
    result = invoke(args)
    assert result.exit_code == 2, (case, result.output)
    line = one_line(result)
    assert quoted in line and hint in line and "policies/p.yaml" in line, line


@pytest.mark.parametrize("op_types", ["[Conv, 'Gemm*']", "[InstanceNormalization]"])
def test_an_op_type_scope_naming_an_onnx_op_passes_the_scope_check(zoo: Path,
                                                                    op_types: str) -> None:
    """The negative control of the op-type typo: ops of the common list (checked without
    importing onnx) and an op outside it (checked against onnx's whole list) are no error."""
    write(zoo, "policies/p.yaml", POLICY.format(
        policy_extra="", rule_extra=f"    level: layer\n    op_types: {op_types}\n"))
    result = invoke(["audit"])
    assert result.exit_code == 0, result.output


def test_the_common_op_types_are_onnx_operators() -> None:
    # source: the ONNX operator specification, as the installed onnx lists it (onnx.defs)
    import onnx.defs

    from gate.policy.scopes import COMMON_OP_TYPES

    standard = {s.name for s in onnx.defs.get_all_schemas_with_history() if s.domain == ""}
    assert COMMON_OP_TYPES <= standard, sorted(COMMON_OP_TYPES - standard)


def waiver(models: str = "['models/**']", targets: str = f"[{TARGET}]") -> str:
    """A valid waiver of params-fit (expiring in 30 days) with the given scope."""
    expires = (date.today() + timedelta(days=30)).isoformat()
    return (f"waivers:\n  - rule: params-fit\n    models: {models}\n    targets: {targets}\n"
            f"    reason: 'the vendor compiler splits this layer, decided by ml-infra'\n"
            f"    expires: {expires}\n")


WAIVER_TYPOS = {
    "waiver targets": (waiver(targets="[ws-64x64-4mb]"), "targets: 'ws-64x64-4mb'",
                       "did you mean 'ws-64x64-4mib'?"),
    "waiver models": (waiver(models="['models/b.onnx']"), "models: 'models/b.onnx'",
                      "did you mean 'models/a.onnx'?"),
}


@pytest.mark.parametrize("case", sorted(WAIVER_TYPOS))
@pytest.mark.parametrize("command", ["audit", "evaluate"])
def test_a_waiver_scope_that_matches_nothing_is_exit_2_with_did_you_mean(
        zoo: Path, case: str, command: str) -> None:
    waiver_text, quoted, hint = WAIVER_TYPOS[case]
    write(zoo, "policies/p.yaml", POLICY.format(policy_extra="", rule_extra="") + waiver_text)
    args = ["audit"] if command == "audit" else ["evaluate", "models/a.onnx"]
    result = invoke(args)
    assert result.exit_code == 2, (case, result.output)
    line = one_line(result)
    assert "waivers[params-fit]" in line and quoted in line and hint in line, line
    assert "a waiver that matches nothing waives nothing" in line, line


def test_a_waiver_whose_scope_matches_passes_the_scope_check(zoo: Path) -> None:
    """The negative control: the same waiver with a matching scope is no error."""
    write(zoo, "policies/p.yaml", POLICY.format(policy_extra="", rule_extra="") + waiver())
    result = invoke(["audit"])
    assert result.exit_code == 0, result.output


def test_a_scope_typo_fails_check_too(repo: Repo) -> None:
    repo.write("policies/p.yaml", POLICY.format(policy_extra="targets: [ws-64x64-4mb]\n",
                                               rule_extra=""))
    repo.commit("scope typo on the target branch")  # check reads its rules at the merge base
    repo.git("branch", "-f", "main")
    save_model(fc_model(96), repo.path / "models/a.onnx")
    repo.commit("grow")
    result = invoke(["check", "--base", "main"])
    line = one_line(result)
    assert result.exit_code == 2 and "did you mean 'ws-64x64-4mib'?" in line
    # the base's policy file is named as git names it (REV:path), not by its temporary copy
    base = repo.git("rev-parse", "--short=12", "main").strip()
    assert line.startswith(f"Error: {base}:policies/p.yaml"), line
    assert "roofgate-base-" not in result.output


def test_a_model_x_target_no_rule_judges_is_exit_2(zoo: Path) -> None:
    """The policy is scoped to a target of the run, but not to this model's target."""
    write(zoo, "roofgate.yaml", CONFIG + f"  - paths: ['other/*.onnx']\n    targets: [{OTHER_TARGET}]\n")
    save_model(fc_model(64), zoo / "other/b.onnx")
    write(zoo, "policies/p.yaml", POLICY.format(policy_extra=f"targets: [{OTHER_TARGET}]\n",
                                               rule_extra=""))
    result = invoke(["audit"])
    assert result.exit_code == 2, result.output
    line = one_line(result)
    assert "models/a.onnx" in line and "no policy rule applies on target ws-64x64-4mib" in line


# --- no policy, no pass; a model that could not be costed never passes ------------------

def test_no_policy_is_exit_2_with_the_remedy_in_check(repo: Repo) -> None:
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\nmodels:\n  - paths: ['models/*.onnx']\n")
    repo.commit("no policy on the target branch")  # check reads its rules at the merge base
    repo.git("branch", "-f", "main")
    save_model(fc_model(96), repo.path / "models/a.onnx")
    repo.commit("grow")
    result = invoke(["check", "--base", "main"])
    assert result.exit_code == 2
    line = one_line(result)
    assert line.startswith("Error: models/a.onnx: no policy applies to this model")
    assert "-p FILE" in line and "'policies:' to roofgate.yaml" in line and "-p default" in line


@pytest.mark.parametrize("allow", ["false", "true"])
def test_a_model_that_could_not_be_costed_never_passes(zoo: Path, allow: str) -> None:
    write(zoo, "policies/p.yaml", POLICY.format(
        policy_extra=f"allow_unanalysable: {allow}\n", rule_extra=""))
    save(small_cnn(batch="N"), zoo / "models/unbound.onnx")  # every MAC behind an unbound dim
    for args in (["audit"], ["evaluate", "models/unbound.onnx"]):
        result = invoke(args)
        assert result.exit_code == 1, (args, result.output)
        assert "not-costed" in result.output and "--dim" in result.output, result.output
    assert invoke(["evaluate", "models/unbound.onnx", "--dim", "N=1"]).exit_code == 0


# --- random mistakes never exit 0 -----------------------------------------------------

MISTAKES = {
    "group glob typo": lambda: ("config", CONFIG.replace("models/**", "model/**")),
    "ungated glob typo": lambda: ("config", CONFIG + "ungated: ['scrach/*.onnx']\n"),
    "no policies": lambda: ("config", CONFIG.replace("policies: [policies/p.yaml]\n", "")),
    "policy target typo": lambda: ("policy", POLICY.format(policy_extra="targets: [ws-64]\n",
                                                           rule_extra="")),
    "rule target typo": lambda: ("policy", POLICY.format(policy_extra="",
                                                         rule_extra="    targets: [ws64x64]\n")),
    "rule model typo": lambda: ("policy", POLICY.format(policy_extra="",
                                                        rule_extra="    models: ['modles/*']\n")),
    "rule op typo": lambda: ("policy", POLICY.format(
        policy_extra="", rule_extra="    level: layer\n    op_types: [Gemmm]\n")),
    "unit-less limit": lambda: ("policy", POLICY.format(
        policy_extra="", rule_extra="") + "  - {id: lat, kind: max_latency, max: 5}\n"),
    "share written as a percent number": lambda: ("policy", POLICY.format(
        policy_extra="", rule_extra="") + "  - {id: c, kind: max_unmodelled, "
        "max_work_share: 5}\n"),
    "model outside groups": lambda: ("stray", ""),
    "waiver target typo": lambda: ("policy", POLICY.format(policy_extra="", rule_extra="")
                                   + waiver(targets="[ws-64x64-4mb]")),
    "waiver model typo": lambda: ("policy", POLICY.format(policy_extra="", rule_extra="")
                                  + waiver(models="['modles/**']")),
}


def _apply_mistakes(mistakes: list[str], write_file, stray) -> None:
    """Write the config and policy with ``mistakes`` in them through ``write_file``."""
    write_file("roofgate.yaml", CONFIG)
    write_file("policies/p.yaml", POLICY.format(policy_extra="", rule_extra=""))
    for name in mistakes:
        kind, text = MISTAKES[name]()
        if kind == "config":
            write_file("roofgate.yaml", text)
        elif kind == "policy":
            write_file("policies/p.yaml", text)
        else:
            stray()


def _run_in(root: Path, args: list[str]):
    old = Path.cwd()
    os.chdir(root)
    try:
        return invoke(args)
    finally:
        os.chdir(old)


def _check_repo(root: Path, mistakes: list[str]) -> None:
    """A real git repository: the mistakes on the target branch (check reads its rules at
    the merge base), a pull request that grows the model (and adds a stray one)."""
    repo = Repo(root)
    save_model(fc_model(64), root / "models/a.onnx")
    strays: list[bool] = []
    _apply_mistakes(mistakes, repo.write, lambda: strays.append(True))
    repo.commit("base with the mistakes")
    repo.branch("pr")
    save_model(fc_model(96), root / "models/a.onnx")
    if strays:  # a changed .onnx outside every model group
        save_model(fc_model(32), root / "scratch/stray.onnx")
    repo.commit("grow")


@settings(max_examples=20, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(mistakes=st.lists(st.sampled_from(sorted(MISTAKES)), min_size=1, max_size=3, unique=True),
       command=st.sampled_from(["audit", "evaluate", "check"]))
def test_no_run_with_a_mistake_exits_0(tmp_path_factory, mistakes: list[str],
                                       command: str) -> None:
    root = tmp_path_factory.mktemp("mistake")
    if command == "check":
        _check_repo(root, mistakes)
        result = _run_in(root, ["check", "--base", "main"])
    else:
        save_model(fc_model(64), root / "models/a.onnx")
        _apply_mistakes(mistakes, lambda path, text: write(root, path, text),
                        lambda: save_model(fc_model(32), root / "scratch/stray.onnx"))
        if command == "evaluate" and mistakes == ["model outside groups"]:
            return  # evaluate judges the named files only: a stray file elsewhere is no mistake
        result = _run_in(root, ["audit"] if command == "audit" else ["evaluate", "models/a.onnx"])
    assert result.exit_code in (1, 2), (mistakes, command, result.output)
    assert "Traceback" not in result.output


def test_check_without_a_mistake_exits_0(tmp_path: Path) -> None:
    """The negative control of the property above: the same repository, no mistake."""
    _check_repo(tmp_path / "repo", [])
    result = _run_in(tmp_path / "repo", ["check", "--base", "main"])
    assert result.exit_code == 0, result.output


# --- unknown is never zero: an unbound dim in every command ------------------------------

UNBOUND_COMMANDS = {
    "profile": (["profile", "models/unbound.onnx", "--format", "json"], 0),
    "evaluate": (["evaluate", "models/unbound.onnx"], 1),
    "baseline": (["baseline", "models/unbound.onnx", "-o", "snap.json"], 0),
    "diff": (["diff", "models/unbound.onnx", "models/unbound.onnx"], 0),
    "audit": (["audit", "models/unbound.onnx"], 1),
}


@pytest.mark.parametrize("command", sorted(UNBOUND_COMMANDS))
def test_an_unbound_dim_is_unknown_never_zero_in_every_command(zoo: Path, command: str) -> None:
    """Latency, energy and MACs of a model whose every MAC sits behind an unbound dim are
    unknown ('?', null in JSON), never 0 or '='; the remedy (--dim) is named."""
    import json

    save(small_cnn(batch="N"), zoo / "models/unbound.onnx")
    args, code = UNBOUND_COMMANDS[command]
    result = invoke(args)
    assert result.exit_code == code, (command, result.output)
    assert "--dim N=N" in result.output, (command, result.output)
    if command == "profile":
        document = json.loads(result.stdout)
        (record,) = document["targets"]
        assert record["metrics"]["latency_s"] is None and record["metrics"]["macs"] is None
        assert document["totals"]["macs"] is None  # not 0
        assert "unbound symbolic dims" in result.stderr
    elif command == "baseline":
        (run,) = json.loads((zoo / "snap.json").read_text())["runs"]
        assert run["metrics"]["energy_j"] is None
        assert result.stderr.startswith("warning: models/unbound.onnx on ws-64x64-4mib: ")
    elif command == "diff":
        latency = next(line for line in result.stdout.splitlines()
                       if line.strip().startswith("latency"))
        assert latency.split() == ["latency", "?", "->", "?", "?"], latency
        assert "warning:" in result.stderr and "unknown" in result.stderr
    else:
        assert "not costed" in result.output and "latency 0 ms" not in result.output


def test_check_with_an_unbound_dim_fails_and_names_the_remedy(repo: Repo) -> None:
    save(small_cnn(batch="N"), repo.path / "models/unbound.onnx")
    repo.commit("an unbound model")
    result = invoke(["check", "--base", "main"])
    assert result.exit_code == 1, result.output
    assert "not-costed" in result.output and "--dim N=N" in result.output
