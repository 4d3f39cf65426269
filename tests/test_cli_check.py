"""End to end in temporary git repositories: `roofgate check`, `audit`, `merge` through the CLI.

Models are built in code (gate.synth, external-weight references, nothing
downloaded). Parameter bytes of a Gemm layer are in_features x out_features
x 4 bytes (fp32) plus the bias (ONNX operator spec, Gemm: B is K x N, C is N),
so the layer sizes below are worked out by hand.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from xml.etree import ElementTree

import pytest
from click.testing import CliRunner

from gate.cli import cli
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import Repo, repo_with_a_change

TARGET = "ws-64x64-4mib"
MIB = 1024 * 1024
POLICY = """\
version: 1
name: test-gate
rules:
  - id: params-fit-buffer
    kind: fits_in_buffer
    check: params
"""


def fc_model(out_features: int, *, name: str = "fc.grown", in_features: int = 1024):
    """One Gemm layer: (in x out) fp32 weights + out bias."""
    b = NetBuilder("fc", weights="external")
    x = b.input("x", [1, in_features])
    b.output(b.gemm(x, out_features, name=name))
    return b.build()


@pytest.fixture()
def repo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Repo:
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n")
    repo.write("policies/gate.yaml", POLICY)
    save_model(fc_model(256), repo.path / "models/a.onnx")  # 1 MiB of weights
    save_model(fc_model(128), repo.path / "models/b.onnx")
    repo.commit("base")
    repo.branch("pr")
    monkeypatch.chdir(repo.path)
    return repo


def check(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, ["check", "--base", "main", *args])
    return result.exit_code, result.stdout, result.stderr


def test_regressing_change_exits_1_and_junit_names_the_layer(repo: Repo) -> None:
    save_model(fc_model(2048), repo.path / "models/a.onnx")  # 8 MiB: past a 4 MiB buffer
    repo.commit("grow fc")
    code, out, _ = check()
    assert code == 1, out
    junit = (repo.path / "roofgate-out/junit.xml").read_text(encoding="utf-8")
    assert "<failure" in junit and "fc.grown" in junit
    assert "FAIL" in out and "models/a.onnx" in out and "exit 1" in out
    result = json.loads((repo.path / "roofgate-out/result.json").read_text())
    assert "models/b.onnx" not in json.dumps(result)  # unchanged models are not gated


def test_clean_change_exits_0(repo: Repo) -> None:
    save_model(fc_model(64), repo.path / "models/a.onnx")  # smaller: an improvement
    repo.commit("shrink fc")
    code, out, _ = check()
    assert code == 0, out
    assert (repo.path / "roofgate-out/summary.md").read_text(encoding="utf-8").strip()


def test_added_and_deleted_models_are_handled(repo: Repo) -> None:
    (repo.path / "models/b.onnx").unlink()
    save_model(fc_model(32, name="fc.new"), repo.path / "models/new.onnx")
    repo.commit("add and delete")
    code, out, _ = check()
    assert code == 0, out
    data = json.dumps(json.loads((repo.path / "roofgate-out/result.json").read_text()))
    assert "models/new.onnx" in data and "models/b.onnx" in data
    assert "  REMOVED  models/b.onnx on ws-64x64-4mib  (no longer present" in out
    assert "  PASS     models/new.onnx" in out and "new, no baseline" in out


def test_renamed_model_is_compared_with_its_old_file(repo: Repo) -> None:
    (repo.path / "models/moved").mkdir()
    os.rename(repo.path / "models/a.onnx", repo.path / "models/moved/a2.onnx")
    repo.commit("move")
    code, out, _ = check()
    assert code == 0, out
    assert "models/a.onnx was renamed to models/moved/a2.onnx" in out


def test_no_models_changed(repo: Repo) -> None:
    repo.write("README.md", "docs only\n")
    repo.commit("docs")
    code, out, _ = check()
    assert code == 0
    assert "No models changed" in out
    assert "No models changed" in (repo.path / "roofgate-out/summary.md").read_text()


def test_lfs_pointer_is_a_clear_error(repo: Repo) -> None:
    repo.write("models/a.onnx", "version https://git-lfs.github.com/spec/v1\n"
               "oid sha256:" + "ab" * 32 + "\nsize 4096\n")
    repo.commit("lfs pointer")
    code, out, _ = check()
    assert code == 2, out
    assert "git lfs pull" in out and "models/a.onnx" in out


@pytest.mark.parametrize("name", [
    "models/with space.onnx", "models/quote'\"d.onnx", "models/-rf.onnx",
    "models/ünïcødé 模型.onnx",
])
def test_hostile_file_names(repo: Repo, name: str) -> None:
    save_model(fc_model(4096), repo.path / name)  # 16 MiB: fails the gate
    repo.commit("hostile name")
    code, out, _ = check()
    assert code == 1, out
    assert name in out
    tree = ElementTree.parse(repo.path / "roofgate-out/junit.xml")
    assert any(name in value for case in tree.iter("testcase") for value in case.attrib.values())


def test_staged_check_judges_the_index_not_head_nor_the_working_tree(repo: Repo) -> None:
    """--staged reads the pull-request side from the index (``git cat-file`` of ``:path``)."""
    save_model(fc_model(2048), repo.path / "models/a.onnx")  # 8 MiB: past a 4 MiB buffer
    repo.git("add", "models/a.onnx")
    save_model(fc_model(64), repo.path / "models/a.onnx")  # the working tree: small again
    code, out, _ = check("--staged")
    assert code == 1, out  # the staged (grown) model is judged
    assert "in the staged files" in out and "models/a.onnx" in out
    assert "fc.grown" in (repo.path / "roofgate-out/junit.xml").read_text(encoding="utf-8")
    code, out, _ = check()  # HEAD still holds the base's model: nothing changed
    assert code == 0 and "no models changed" in out, out

    repo.git("add", "models/a.onnx")  # stage the small one
    repo.git("commit", "-q", "-m", "small")
    save_model(fc_model(2048), repo.path / "models/b.onnx")  # grown, in the working tree only
    save_model(fc_model(4096), repo.path / "models/a.onnx")  # and this one too
    code, out, _ = check("--staged")
    assert code == 0, out  # the index holds the small a.onnx and the base's b.onnx
    assert "1 changed model(s)" in out

    repo.git("add", "models/b.onnx")
    repo.git("checkout", "--", "models/a.onnx")
    repo.git("commit", "-q", "-m", "grown b")  # HEAD now fails ...
    assert check()[0] == 1
    repo.git("reset", "-q", "--soft", "HEAD~1")
    repo.git("restore", "--staged", "models/b.onnx")  # ... but the index does not
    save_model(fc_model(2048), repo.path / "models/b.onnx")
    code, out, _ = check("--staged")
    assert code == 0, out


def test_check_reports_are_byte_identical_with_one_or_two_workers(repo: Repo) -> None:
    for k, width in enumerate((64, 2048, 32, 96, 512)):
        save_model(fc_model(width, name=f"fc{k}"), repo.path / f"models/m{k}.onnx")
    save_model(fc_model(512), repo.path / "models/a.onnx")
    (repo.path / "models/b.onnx").unlink()
    repo.commit("many changes")
    runner = CliRunner()
    one = runner.invoke(cli, ["check", "--base", "main", "-j", "1", *reports("j1")])
    two = runner.invoke(cli, ["check", "--base", "main", "-j", "2", *reports("j2")])
    assert one.exit_code == two.exit_code == 1, one.output
    assert read_reports("j1") == read_reports("j2")


def test_a_run_that_judged_nothing_writes_the_same_reports_with_two_workers(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A target typo in the target branch's config: the changed model cannot be analysed,
    so the run has no model x target at all (exit 2). With -j 2 its reports are rendered
    side by side, and a JSON report without entries once crashed there (exit 3)."""
    repo = repo_with_a_change(
        tmp_path / "repo", {"roofgate.yaml": "targets: [ws-64x64-4mb]\n"
                                             "policies: [policies/gate.yaml]\n",
                            "policies/gate.yaml": POLICY},
        "models/a.onnx", fc_model(256), fc_model(512))
    monkeypatch.chdir(repo.path)
    runner = CliRunner()
    one = runner.invoke(cli, ["check", "--base", "main", "-j", "1", *reports("j1")])
    two = runner.invoke(cli, ["check", "--base", "main", "-j", "2", *reports("j2")])
    assert one.exit_code == two.exit_code == 2, two.output
    assert "ws-64x64-4mb" in two.output and "internal error" not in two.output
    assert json.loads(read_reports("j2")["result.json"])["result"]["entries"] == []
    assert read_reports("j1") == read_reports("j2")


def test_sides_left_per_change_are_counted_in_one_pass(repo: Repo, monkeypatch) -> None:
    """Knowing when a change's sides are all in (to judge it early) costs one look per
    side, not one per side and change: 1000 changed models once took 2 million."""
    from gate import ci

    count = 40
    for k in range(count):
        save_model(fc_model(8 + k, in_features=16), repo.path / f"models/many/m{k}.onnx")
    repo.commit("many models")
    repo.git("checkout", "-q", "-b", "many-changed")
    for k in range(count):
        save_model(fc_model(9 + k, in_features=16), repo.path / f"models/many/m{k}.onnx")
    repo.commit("change them all")
    looks = []
    real = ci._change_path
    monkeypatch.setattr(ci, "_change_path", lambda key: looks.append(key) or real(key))
    result = CliRunner().invoke(cli, ["check", "--base", "pr"])
    assert result.exit_code == 0, result.stdout
    assert f"{count} changed model(s)" in result.stdout
    sides = 2 * count
    assert len(looks) <= 3 * sides  # counting, then one look per arriving side


def test_base_side_from_a_stored_snapshot(repo: Repo) -> None:
    runner = CliRunner()
    done = runner.invoke(cli, ["audit", "--snapshot", "base.json", "--json", "audit.json"])
    assert done.exit_code == 0, done.output
    save_model(fc_model(64), repo.path / "models/a.onnx")
    repo.commit("shrink")
    code, out, _ = check("--baseline", "base.json")
    assert code == 0, out


def test_models_outside_the_config_groups_are_listed_and_fail_unless_ungated(repo: Repo) -> None:
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n"
               "models:\n  - paths: ['models/a.onnx']\n")
    repo.commit("configure only models/a.onnx")
    repo.git("branch", "-f", "main")  # check reads the config at the merge base
    save_model(fc_model(4096), repo.path / "models/b.onnx")  # would fail, but not configured
    save_model(fc_model(4096), repo.path / "scratch/c.onnx")
    repo.commit("unconfigured models")
    code, out, _ = check()
    assert code == 1, out  # never "No models changed" and a pass
    assert "  NOT GATED models/b.onnx: no model group" in out and "scratch/c.onnx" in out
    assert out.splitlines()[0].endswith(": 0 gated, 2 not gated, 0 skipped"), out
    assert "2 changed model(s) not gated (not-gated) (exit 1)" in out.splitlines()[-2]
    lines = out.splitlines()  # what blocked leads: right after the headline, once per model
    assert lines[1] == "BLOCKED by 1 rule:", out
    assert lines[2].startswith("  1. models/b.onnx: rule not-gated fails: no model group"), out
    assert lines[3].startswith("  2. scratch/c.onnx: rule not-gated fails:"), out
    summary = (repo.path / "roofgate-out/summary.md").read_text(encoding="utf-8")
    assert "**Blocking: 1 rule**" in summary and "rule not-gated fails" in summary
    junit = (repo.path / "roofgate-out/junit.xml").read_text(encoding="utf-8")
    assert 'type="not-gated"' in junit and "models/b.onnx" in junit
    repo.git("checkout", "-q", "main")  # the target branch ungates them (check reads its rules)
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n"
               "models:\n  - paths: ['models/a.onnx']\nungated: ['models/b.onnx', 'scratch/**']\n")
    repo.commit("ungate b and scratch")
    repo.git("checkout", "-q", "pr")
    repo.git("merge", "-q", "--no-edit", "main")
    code, out, _ = check()
    assert code == 0, out
    assert "  SKIPPED  models/b.onnx: skipped: listed under 'ungated:'" in out
    assert out.splitlines()[0].endswith(": 0 gated, 0 not gated, 2 skipped"), out
    code, out, _ = check("--config", str(repo.path / "other.yaml"))
    assert code == 2


def test_bad_config_and_unknown_base_exit_2(repo: Repo) -> None:
    code, _out, err = check_with_base("no-such-branch")
    assert code == 2 and "unknown git revision 'no-such-branch'" in err
    repo.write("roofgate.yaml", "target: [x]\n")
    repo.commit("break the config")  # rules come from the base, but a broken head stops too
    code, _out, err = check()
    assert code == 2 and "did you mean 'targets'" in err


def check_with_base(ref: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, ["check", "--base", ref])
    return result.exit_code, result.stdout, result.stderr


# --- audit and merge -------------------------------------------------------------------

@pytest.fixture()
def zoo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    root = tmp_path / "zoo"
    (root / "policies").mkdir(parents=True)
    (root / "policies/gate.yaml").write_text(POLICY)
    (root / "roofgate.yaml").write_text(f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n")
    for k, width in enumerate((64, 128, 2048, 256, 32)):
        save_model(fc_model(width), root / f"models/m{k} x.onnx")
    (root / "models/broken.onnx").write_bytes(b"not an onnx file")
    monkeypatch.chdir(root)
    return root


def reports(prefix: str) -> list[str]:
    return ["--junit", f"{prefix}/junit.xml", "--markdown", f"{prefix}/summary.md",
            "--json", f"{prefix}/result.json"]


def read_reports(prefix: str) -> dict[str, bytes]:
    return {name: Path(prefix, name).read_bytes()
            for name in ("junit.xml", "summary.md", "result.json")}


def test_sharded_audit_merged_equals_unsharded_byte_for_byte(zoo: Path) -> None:
    runner = CliRunner()
    one = runner.invoke(cli, ["audit", "-j", "1", *reports("j1")])
    two = runner.invoke(cli, ["audit", "-j", "2", *reports("j2")])
    assert one.exit_code == two.exit_code == 2, one.output  # broken.onnx fails closed
    assert read_reports("j1") == read_reports("j2")
    shards = []
    for index in (1, 2, 3):
        done = runner.invoke(cli, ["audit", "--shard", f"{index}/3",
                                   "--shard-out", f"shards/s{index}.json"])
        assert done.exit_code in (0, 1, 2), done.output
        shards.append(f"shards/s{index}.json")
    merged = runner.invoke(cli, ["merge", *reversed(shards), *reports("merged")])
    assert merged.exit_code == one.exit_code, merged.output
    assert read_reports("merged") == read_reports("j1")
    side_by_side = runner.invoke(cli, ["merge", "-j", "2", *shards, *reports("merged2")])
    assert side_by_side.exit_code == one.exit_code, side_by_side.output
    assert read_reports("merged2") == read_reports("j1")
    assert "not an onnx" in one.stdout.lower() or "broken.onnx" in one.stdout
    missing = runner.invoke(cli, ["merge", shards[0], shards[2]])
    assert missing.exit_code == 2 and "missing shard(s) 2/3" in missing.stderr


def test_merge_reads_shards_without_importing_the_analysis_stack(zoo: Path) -> None:
    """merge re-analyses nothing, so it must not pay for onnx and numpy at start-up."""
    runner = CliRunner()
    for index in (1, 2):
        done = runner.invoke(cli, ["audit", "--shard", f"{index}/2",
                                   "--shard-out", f"shards/s{index}.json"])
        assert done.exit_code in (0, 1, 2), done.output
    probe = ("import sys\nfrom gate.cli import main\n"
             "sys.argv = ['roofgate', 'merge', '-j', '2', 'shards/s1.json', 'shards/s2.json',"
             " '--json', 'merged.json']\n"
             "try:\n    main()\nfinally:\n"
             "    print(sorted(m for m in ('onnx', 'numpy') if m in sys.modules))\n")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(Path(__file__).parents[1])},
                          check=False)
    assert done.returncode == 2, done.stderr  # broken.onnx: exit 2, like the audit
    assert done.stdout.strip().splitlines()[-1] == "[]"
    assert "m0 x.onnx" in Path("merged.json").read_text()


def test_audit_progress_lines_and_trend(zoo: Path) -> None:
    runner = CliRunner()
    first = runner.invoke(cli, ["audit", "models/m0 x.onnx", "models/m1 x.onnx",
                                "--snapshot", "night1.json"])
    assert first.exit_code == 0, first.output
    assert "roofgate audit: [2/2]" in first.stderr  # plain progress lines off a terminal
    save_model(fc_model(512), zoo / "models/m0 x.onnx")
    second = runner.invoke(cli, ["audit", "models/m0 x.onnx", "models/m1 x.onnx",
                                 "--baseline", "night1.json"])
    assert "1 worse" in second.stdout and "worse: models/m0 x.onnx" in second.stdout


def test_audit_leaves_out_baseline_runs_on_targets_it_does_not_cost(zoo: Path) -> None:
    runner = CliRunner()
    wide = runner.invoke(cli, ["audit", "models/m0 x.onnx", "-t", TARGET, "-t", "os-16x16-512kib",
                               "--snapshot", "base.json", "--json", "wide.json"])
    assert wide.exit_code == 0, wide.output
    done = runner.invoke(cli, ["audit", "models/m0 x.onnx", "--baseline", "base.json",
                               "--json", "narrow.json"])
    assert done.exit_code == 0, done.output
    assert "REMOVED" not in done.stdout and "os-16x16-512kib, which this run does not cost" \
        in done.stdout
    assert "  PASS     models/m0 x.onnx on ws-64x64-4mib" in done.stdout
    assert done.stdout.splitlines()[-4].endswith("unchanged")
    assert done.stdout.splitlines()[-3] == "           rules: params-fit-buffer"


def test_models_under_no_policy_are_refused_alike_sharded_or_not(zoo: Path) -> None:
    """No policy, no pass: exit 2 with the remedy, never an 'analysed' PASS."""
    (zoo / "roofgate.yaml").write_text(f"targets: [{TARGET}]\n")  # no policies
    (zoo / "models/broken.onnx").unlink()
    runner = CliRunner()
    for args in (["audit"], ["audit", "--shard", "1/2"], ["evaluate", "models/m0 x.onnx"]):
        done = runner.invoke(cli, args)
        assert done.exit_code == 2, (args, done.output)
        (line,) = done.stderr.strip().splitlines()
        assert "no policy applies to this model" in line and "-p default" in line, line
        assert "'policies:' in roofgate.yaml" in line or "add 'policies:'" in line


def test_a_report_flag_without_config_reports_writes_only_that_report(zoo: Path) -> None:
    # docs/ci.md: the roofgate-out/ defaults apply only with no `reports:` and no report flag.
    done = CliRunner().invoke(cli, ["audit", "models/m0 x.onnx", "--json", "only.json"])
    assert done.exit_code == 0, done.output
    assert (zoo / "only.json").is_file() and not (zoo / "roofgate-out").exists()
    done = CliRunner().invoke(cli, ["audit", "models/m0 x.onnx"])
    assert sorted(p.name for p in (zoo / "roofgate-out").iterdir()) == \
        ["junit.xml", "result.json", "summary.md"]


def test_an_unanalysable_model_is_named_once_per_line(zoo: Path) -> None:
    done = CliRunner().invoke(cli, ["audit", "models/broken.onnx", "--json", "r.json"])
    assert done.exit_code == 2, done.output
    line = next(l for l in done.stdout.splitlines() if l.startswith("  ERROR"))
    assert line.count("models/broken.onnx") == 1, line
    message = json.loads(Path("r.json").read_text())["result"]["errors"][0]["message"]
    assert not message.startswith("models/broken.onnx")


def test_a_model_committed_as_a_symbolic_link_is_named_not_parsed(repo: Repo) -> None:
    """Git stores a link as its target path: a head side that is a link was read as a
    model and failed as "cannot parse as an ONNX model". It is now named as a link (exit
    2); a base side that was a link makes the model judged as new, with a note."""
    os.remove(repo.path / "models/b.onnx")
    os.symlink("a.onnx", repo.path / "models/b.onnx")  # a valid model behind it
    repo.commit("b becomes a link")
    code, out, _ = check()
    assert code == 2, out
    assert "models/b.onnx: the head side is a symbolic link in git" in out
    assert "cannot parse" not in out
    repo.git("branch", "-f", "main")  # the link is now the base
    os.remove(repo.path / "models/b.onnx")
    save_model(fc_model(128), repo.path / "models/b.onnx")
    repo.commit("b is a file again")
    code, out, _ = check("--json", "r.json")
    assert code == 0, out
    text = (repo.path / "r.json").read_text()
    assert "the base side could not be analysed, so the model is judged as new (it is a " \
           "symbolic link in git, not a model file)" in text
