"""A hostile or careless pull request, through the public command line on real git repositories.

Each case builds a throwaway repository (tests/gitkit.py), commits the base on
``main``, makes the pull request's change on a branch and runs ``roofgate``
as CI would. Every case asserts the exit code, the message, and that nothing
outside the places a run may write changed: the hash of every file of the
working tree outside the report folder, and of ``.git/config``, before and
after. Models are built in code with gate/synth (nothing downloaded).

Parameter bytes of a Gemm layer are in_features x out_features x 4 (fp32) plus
the bias (ONNX operator specification, Gemm: B is K x N, C is N).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from click.testing import CliRunner, Result
from onnx import TensorProto, helper, numpy_helper

from gate.cli import cli
from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import Repo

WORKTREE = Path(__file__).resolve().parents[1]
TARGET = "ws-64x64-4mib"
REPORT_DIR = "roofgate-out"
POLICY = """\
version: 1
name: pr-gate
rules:
  - {id: params-fit-buffer, kind: fits_in_buffer, check: params}
  - {id: latency-regression, kind: max_regression, metric: latency_s, max_increase_pct: 10}
"""
CONFIG = f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\nmodels:\n  - paths: ['models/**/*.onnx']\n"


def fc_model(out_features: int, *, in_features: int = 1024, name: str = "fc"):
    """One Gemm layer: (in x out) fp32 weights + out bias (external weights, no data)."""
    builder = NetBuilder("fc", weights="external")
    x = builder.input("x", [1, in_features])
    builder.output(builder.gemm(x, out_features, name=name))
    return builder.build()


# --- the repository and its fingerprint -------------------------------------------------

def make_repo(tmp_path: Path, config: str = CONFIG, extra: dict[str, str] | None = None) -> Repo:
    """``main`` holds the config, the policy and models/a.onnx (1 MiB of weights); on branch ``pr``."""
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", config)
    repo.write("policies/gate.yaml", POLICY)
    for rel, text in (extra or {}).items():
        repo.write(rel, text)
    save_model(fc_model(256), repo.path / "models/a.onnx")
    repo.commit("base")
    repo.branch("pr")
    return repo


def fingerprint(repo: Repo) -> dict[str, str]:
    """sha256 of every file (and link target) outside ``.git`` and roofgate-out, and of .git/config."""
    found: dict[str, str] = {}
    for folder, dirs, files in os.walk(repo.path):
        rel_folder = Path(folder).relative_to(repo.path)
        if rel_folder.parts[:1] in ((".git",), (REPORT_DIR,)):
            dirs[:] = []
            continue
        for name in [*files, *(d for d in dirs if (Path(folder) / d).is_symlink())]:
            path = Path(folder) / name
            rel = (rel_folder / name).as_posix()
            data = os.readlink(path).encode() if path.is_symlink() else path.read_bytes()
            found[rel] = hashlib.sha256(data).hexdigest()
    found[".git/config"] = hashlib.sha256((repo.path / ".git/config").read_bytes()).hexdigest()
    return found


def check(repo: Repo, *args: str) -> Result:
    """``roofgate check --base main`` in ``repo`` (in process, stdout and stderr apart)."""
    cwd = os.getcwd()
    os.chdir(repo.path)
    try:
        return CliRunner().invoke(cli, ["check", "--base", "main", *args])
    finally:
        os.chdir(cwd)


def run_cli(repo: Repo, *args: str) -> subprocess.CompletedProcess[str]:
    """``roofgate ARGS`` as a separate process of this worktree's code (for signals, concurrency)."""
    env = {**os.environ, "PYTHONPATH": str(WORKTREE)}
    return subprocess.run([sys.executable, "-c", "from gate.cli import main; main()", *args],
                          cwd=repo.path, env=env, capture_output=True, text=True, check=False)


def reports(repo: Repo) -> dict[str, str]:
    folder = repo.path / REPORT_DIR
    if not folder.is_dir():
        return {}
    return {p.name: p.read_text(encoding="utf-8") for p in sorted(folder.iterdir())}


def assert_clean_exit(result: Result, code: int, needle: str) -> None:
    output = result.stdout + result.stderr
    assert result.exit_code == code, output
    assert needle in output, output
    assert "Traceback" not in output


# --- 2. reports only where they belong --------------------------------------------------

@pytest.mark.parametrize("key, path, reason", [
    ("json", ".git/config", "inside a .git folder"),
    ("junit", ".git/hooks/pre-commit", "inside a .git folder"),
    ("json", "../../x.json", "outside the working tree"),
    ("json", "/tmp/roofgate-hostile-abs.json", "outside the working tree"),
    ("markdown", "models/a.onnx", "model path"),
    ("markdown", "models/notes.md", ""),  # allowed: inside the tree, not an input
    ("json", "policies/gate.yaml", "a file this run reads"),
    ("json", "roofgate.yaml", "a file this run reads"),
    ("junit", "roofgate-out/", "folder, not a file"),
    ("junit", "roofgate-out/..", "folder, not a file"),
])
def test_config_report_paths_stay_in_the_tree(tmp_path: Path, key: str, path: str,
                                              reason: str) -> None:
    repo = make_repo(tmp_path, CONFIG + f"reports: {{{key}: '{path}'}}\n")
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    before = fingerprint(repo)
    result = check(repo)
    if not reason:
        assert result.exit_code == 0, result.stdout + result.stderr
        assert "roofgate check: clear to merge" in (repo.path / path).read_text(encoding="utf-8")
    else:
        assert_clean_exit(result, 2, "may not be written here")
        assert reason in result.stderr
        assert not Path("/tmp/roofgate-hostile-abs.json").exists()
        assert not (tmp_path / "x.json").exists()
    after = fingerprint(repo)
    if not reason:
        assert after.pop("models/notes.md")  # the one file this run may add outside roofgate-out
    assert after == before


def test_committed_links_at_partial_names_are_never_followed(tmp_path: Path) -> None:
    """Links committed where the old fixed partial names were: the reports still land in place."""
    outside = tmp_path / "outside.md"
    outside.write_text("untouched\n")
    repo = make_repo(tmp_path)
    (repo.path / REPORT_DIR).mkdir()
    os.symlink(outside, repo.path / REPORT_DIR / ".summary.md.partial")
    os.symlink("../.git/config", repo.path / REPORT_DIR / ".junit.xml.partial")
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink, and links where partial files were")
    before = fingerprint(repo)
    result = check(repo)
    assert result.exit_code == 0, result.stdout + result.stderr
    assert outside.read_text() == "untouched\n"
    assert fingerprint(repo) == before
    for name in ("junit.xml", "summary.md", "result.json"):
        written = repo.path / REPORT_DIR / name
        assert written.is_file() and not written.is_symlink()
    assert not [p for p in (repo.path / REPORT_DIR).iterdir() if p.name.startswith(".roofgate-")]


def test_a_linked_report_folder_leading_out_of_the_tree_is_refused(tmp_path: Path) -> None:
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    repo = make_repo(tmp_path)
    os.symlink(elsewhere, repo.path / REPORT_DIR)
    repo.commit("report folder is a link")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, "outside the working tree")
    assert list(elsewhere.iterdir()) == []
    assert fingerprint(repo) == before


def test_stale_reports_are_removed_when_the_run_exits_early(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    (repo.path / "models/a.onnx").write_bytes(b"not an onnx model")
    repo.commit("break the model")
    folder = repo.path / REPORT_DIR
    folder.mkdir()
    for name in ("junit.xml", "summary.md", "result.json"):
        (folder / name).write_text("an old PASS\n")
    dead_partial = folder / ".roofgate-999999999-0123456789abcdef.partial"  # from a killed run
    dead_partial.write_text("half")
    before = fingerprint(repo)
    result = check(repo, "--target", "no-such-target")
    assert_clean_exit(result, 2, "no-such-target")
    assert "an old PASS" not in "".join(reports(repo).values())
    assert not dead_partial.exists()
    assert fingerprint(repo) == before


@pytest.mark.parametrize(("jobs", "renderer"), [("1", "json"), ("2", "json"), ("2", "markdown")])
def test_a_failing_renderer_leaves_no_report_beside_the_exit_code(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, jobs: str, renderer: str) -> None:
    """With -j 2 the reports are rendered side by side (gate/forked.py): the JSON one in
    this process, the markdown one in a child; a failure in either is the same exit 3."""
    from gate.report import jsonout, markdown

    def broken(result: object) -> str:
        raise ValueError("Out of range float values are not JSON compliant")

    if renderer == "json":
        monkeypatch.setattr(jsonout, "result_document", broken)
    else:
        monkeypatch.setattr(markdown, "render", broken)
    repo = make_repo(tmp_path)
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    before = fingerprint(repo)
    result = check(repo, "-j", jobs)
    assert_clean_exit(result, 3, "internal error")
    assert "ValueError: Out of range float values" in result.stdout + result.stderr
    assert reports(repo) == {}  # no junit.xml or summary.md saying "passed"
    assert fingerprint(repo) == before


def test_an_overflowing_target_figure_is_refused_before_anything_is_written(
        tmp_path: Path) -> None:
    from gate.targets import builtin_target_yaml

    text = builtin_target_yaml(TARGET).replace("name: ws-64x64-4mib", "name: slow-bus")
    lines = [("  bandwidth: 1e-320 B/s" if line.strip().startswith("bandwidth:") else line)
             for line in text.splitlines()]
    config = CONFIG.replace(TARGET, "targets/slow.yaml")
    repo = make_repo(tmp_path, config, {"targets/slow.yaml": "\n".join(lines) + "\n"})
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, "dram.bandwidth: 9.99989e-321 B/s is outside the range")
    written = reports(repo)  # the model could not be costed: every report says so
    assert json.loads(written["result.json"])["exit_code"] == 2
    assert "passed" not in written["summary.md"] and "<failure" in written["junit.xml"] or \
        "<error" in written["junit.xml"]
    profiled = run_cli(repo, "profile", "models/a.onnx", "-t", "targets/slow.yaml",
                       "--format", "json")
    assert profiled.returncode == 2 and "Infinity" not in profiled.stdout, profiled
    assert fingerprint(repo) == before


def test_a_snapshot_the_reader_would_refuse_is_never_written(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from gate import snapshot

    repo = make_repo(tmp_path)
    monkeypatch.setattr(snapshot, "MAX_SNAPSHOT_BYTES", 2000)  # one run is ~3 kB
    before = fingerprint(repo)
    cwd = os.getcwd()
    os.chdir(repo.path)
    try:
        result = CliRunner().invoke(cli, ["baseline", "models/a.onnx", "-t", TARGET,
                                          "-o", f"{REPORT_DIR}/base.json"])
    finally:
        os.chdir(cwd)
    assert_clean_exit(result, 2, "over the 2000-byte limit")
    assert not (repo.path / REPORT_DIR / "base.json").exists()
    assert fingerprint(repo) == before


@pytest.mark.parametrize("length", [251, 255, 256])
def test_long_report_names_are_written_or_refused_cleanly(tmp_path: Path, length: int) -> None:
    repo = make_repo(tmp_path)
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    name = "r" * (length - 5) + ".json"
    before = fingerprint(repo)
    result = check(repo, "--json", f"{REPORT_DIR}/{name}")
    if length <= 255:
        assert result.exit_code == 0, result.stdout + result.stderr
        assert json.loads((repo.path / REPORT_DIR / name).read_text())["exit_code"] == 0
    else:
        assert_clean_exit(result, 2, "file name is too long")
        assert reports(repo) == {}
    assert fingerprint(repo) == before


def test_two_concurrent_runs_leave_one_runs_reports_or_an_error(tmp_path: Path) -> None:
    """Two checks on different targets write the same folder at once: never a mix."""
    repo = make_repo(tmp_path)
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    before = fingerprint(repo)
    env = {**os.environ, "PYTHONPATH": str(WORKTREE)}
    for _ in range(3):
        runs = [subprocess.Popen(
            [sys.executable, "-c", "from gate.cli import main; main()", "check", "--base",
             "main", "--target", target], cwd=repo.path, env=env,
            stdout=subprocess.PIPE, stderr=subprocess.PIPE) for target in
            (TARGET, "os-16x16-512kib")]
        codes = [run.wait() for run in runs]
        for run in runs:
            run.stdout.close()  # type: ignore[union-attr]
            run.stderr.close()  # type: ignore[union-attr]
        assert set(codes) <= {0, 1, 2}, codes
        written = reports(repo)
        if written:
            assert sorted(written) == ["junit.xml", "result.json", "summary.md"]
            named = {t for t in (TARGET, "os-16x16-512kib") if t in written["result.json"]}
            assert len(named) == 1, "reports of two runs are mixed"
            (target,) = named
            assert target in written["junit.xml"] and target in written["summary.md"]
            other = ({TARGET, "os-16x16-512kib"} - named).pop()
            assert other not in written["junit.xml"] + written["summary.md"]
    assert fingerprint(repo) == before


# --- 4. nothing model-supplied steers the log or the comment ------------------------------

# Runner log commands: GitHub's legacy "##[cmd]" anywhere in a line and "::cmd::" at its
# start (GitHub Actions workflow-command documentation), Azure's "##vso[" and TeamCity's
# "##teamcity[" (from memory of their documentation).
LOG_MARKERS = ("##[", "##vso[", "##teamcity[")
HOSTILE_LAYER = ("#123 GH-7 @admin https://evil.example/x www.evil.example ##[error]forged "
                 "##[add-mask]secret ##[stop-commands]tok ##vso[task.complete]")
HOSTILE_MODEL = "models/##[error]pwned ::warning::x.onnx"


def assert_log_inert(text: str) -> None:
    """No runner marker in any line; ``::`` opens only roofgate's own annotation lines."""
    for line in text.splitlines():
        assert not any(marker in line for marker in LOG_MARKERS), line
        assert not line.lstrip().startswith("::") or line.startswith("::error file=models/"), line


def test_model_text_cannot_forge_runner_commands_or_links(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    save_model(fc_model(2048, name=HOSTILE_LAYER), repo.path / HOSTILE_MODEL)  # 8 MiB: fails
    save_model(fc_model(200, name=HOSTILE_LAYER), repo.path / "models/a.onnx")
    repo.commit("hostile names")
    before = fingerprint(repo)
    result = check(repo, "--annotations", "-", "--markdown", f"{REPORT_DIR}/summary.md",
                   "--json", f"{REPORT_DIR}/result.json")
    assert result.exit_code == 1, result.stdout + result.stderr
    assert "#\\x23[error]forged" in result.stdout  # shown, defused
    assert_log_inert(result.stdout + result.stderr)
    markdown = reports(repo)["summary.md"]
    assert_log_inert(markdown)
    for link in ("https://", "www.evil", "#123", "GH-7", "@admin"):
        assert link not in markdown, link
    assert "https&#8203;://evil.example" in markdown and "#&#8203;123" in markdown
    data = json.loads(reports(repo)["result.json"])  # JSON reads back the exact names
    assert HOSTILE_MODEL in {e["model"] for e in data["result"]["entries"]}
    assert "##[" not in reports(repo)["result.json"]
    for fmt in ("table", "csv", "json"):
        shown = run_cli(repo, "profile", HOSTILE_MODEL, "-t", TARGET, "--format", fmt)
        assert shown.returncode == 0, shown.stderr
        assert_log_inert(shown.stdout + shown.stderr)
        if fmt == "json":
            names = {layer["name"] for layer in json.loads(shown.stdout)["layers"]}
            assert HOSTILE_LAYER in names
    diffed = run_cli(repo, "diff", "models/a.onnx", HOSTILE_MODEL, "-t", TARGET)
    assert diffed.returncode == 0 and "forged" in diffed.stdout, diffed.stderr
    assert_log_inert(diffed.stdout + diffed.stderr)
    audited = run_cli(repo, "audit", "--json", f"{REPORT_DIR}/audit.json")
    assert audited.returncode == 1 and "[2/2]" in audited.stderr, audited.stderr
    assert_log_inert(audited.stdout + audited.stderr)
    broken = repo.path / "models/##[error]broken.onnx"
    broken.write_bytes(b"not a model")
    refused = run_cli(repo, "profile", str(broken.relative_to(repo.path)))
    assert refused.returncode == 2 and "broken.onnx" in refused.stderr
    assert_log_inert(refused.stdout + refused.stderr)
    broken.unlink()
    assert fingerprint(repo) == before


# --- 3. integrity of what is read: stale stored shapes, impossible dims ------------------

def conv_with_stored_shapes(side_px: int, stored_px: int):
    """Conv 3x3 (no padding) + Relu on a side_px image; value_info stores the conv output as if
    the input were stored_px + 2 wide. Output side = side - 3 + 1 (ONNX operator spec, Conv)."""
    from onnx import helper

    from tests.loadkit import model, vi, weight

    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], name="conv"),
             helper.make_node("Relu", ["c"], ["y"], name="relu")]
    proto = model(nodes, [vi("x", [1, 3, side_px, side_px])], [vi("y", None)],
                  [weight("w", [16, 3, 3, 3])])
    proto.graph.value_info.append(vi("c", [1, 16, stored_px, stored_px]))
    return proto


def test_stale_stored_shapes_are_an_error_naming_the_tensor(tmp_path: Path) -> None:
    from tests.loadkit import save

    repo = make_repo(tmp_path)
    save(conv_with_stored_shapes(112, 110), repo.path / "models/cam.onnx")  # consistent
    repo.git("add", "-A")
    repo.git("commit", "-q", "-m", "camera model")
    repo.git("branch", "-f", "main")
    save(conv_with_stored_shapes(224, 110), repo.path / "models/cam.onnx")  # input resized only
    repo.commit("resize the input, keep the stored shapes")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, "tensor 'c': the file stores shape [1, 16, 110, 110] but its "
                                 "inputs give [1, 16, 222, 222]")
    assert json.loads(reports(repo)["result.json"])["exit_code"] == 2
    assert fingerprint(repo) == before


def conv_in_branches(side_px: int, stored_px: int, *, nested: bool) -> onnx.ModelProto:
    """An If (constant condition) whose branches run Conv 3x3 + Relu on the outer input; the
    then branch stores its conv output's shape as if the input were stored_px + 2 wide.
    ``nested``: that If sits in the then branch of an outer If."""
    from tests.loadkit import model, vi, weight

    def branch(tag: str, stored: int | None) -> onnx.GraphProto:
        nodes = [helper.make_node("Conv", ["x", "w"], [f"c_{tag}"], name=f"conv_{tag}"),
                 helper.make_node("Relu", [f"c_{tag}"], [f"o_{tag}"], name=f"relu_{tag}")]
        graph = helper.make_graph(nodes, tag, [], [vi(f"o_{tag}", None)])
        if stored is not None:
            graph.value_info.append(vi(f"c_{tag}", [1, 16, stored, stored]))
        return graph

    def if_node(name: str, out: str, then: onnx.GraphProto, other: onnx.GraphProto):
        return helper.make_node("If", ["cond"], [out], name=name, then_branch=then,
                                else_branch=other)

    inner = if_node("inner", "y" if not nested else "o_mid", branch("then", stored_px),
                    branch("else", None))
    if nested:
        middle = helper.make_graph([inner], "mid", [], [vi("o_mid", None)])
        inner = if_node("outer", "y", middle, branch("other", None))
    nodes = [_const("cond", True, np.bool_), inner]
    return model(nodes, [vi("x", [1, 3, side_px, side_px])], [vi("y", None)],
                 [weight("w", [16, 3, 3, 3])])


@pytest.mark.parametrize("nested, where", [
    (False, "(in the then_branch of node 'inner')"),
    (True, "(in the then_branch of node 'inner', in then_branch of node 'outer')"),
])
def test_stale_stored_shapes_in_a_subgraph_are_an_error_naming_the_tensor(
        tmp_path: Path, nested: bool, where: str) -> None:
    from tests.loadkit import save

    consistent = conv_in_branches(112, 110, nested=nested)
    stale = conv_in_branches(224, 110, nested=nested)
    # onnx's own strict inference agrees: the stale file contradicts itself, the other not
    onnx.shape_inference.infer_shapes(consistent, strict_mode=True, data_prop=True)
    with pytest.raises(onnx.shape_inference.InferenceError):
        onnx.shape_inference.infer_shapes(stale, strict_mode=True, data_prop=True)
    repo = make_repo(tmp_path)
    save(consistent, repo.path / "models/cam.onnx")
    repo.commit("camera model with branches")
    repo.git("branch", "-f", "main")
    save(stale, repo.path / "models/cam.onnx")
    repo.commit("resize the input, keep the stored shapes")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, f"tensor 'c_then' {where}: the file stores shape "
                                 "[1, 16, 110, 110] but its inputs give [1, 16, 222, 222]")
    assert fingerprint(repo) == before


def test_stale_stored_shapes_are_found_on_the_path_for_files_over_2_gib(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Files over 2 GiB are inferred through onnx's path-based API; the threshold is lowered
    so a small model with external weights (never opened) takes that path: it is checked
    the same way, and a consistent one passes."""
    from gate.model import loader
    from tests.loadkit import save

    calls: list[str] = []
    real = onnx.shape_inference.infer_shapes_path
    monkeypatch.setattr(loader, "PATH_INFERENCE_BYTES", 1)
    monkeypatch.setattr(onnx.shape_inference, "infer_shapes_path",
                        lambda src, dst, **kw: (calls.append(str(src)), real(src, dst, **kw)))
    repo = make_repo(tmp_path)
    for name, side in (("ok", 112), ("stale", 224)):
        proto = conv_with_stored_shapes(side, 110)
        weight = proto.graph.initializer[0]
        weight.ClearField("raw_data")
        weight.data_location = TensorProto.EXTERNAL
        weight.external_data.add(key="location", value="absent-weights.bin")
        save(proto, repo.path / f"models/{name}.onnx")
    repo.commit("two camera models with external weights")
    before = fingerprint(repo)
    cwd = os.getcwd()
    os.chdir(repo.path)
    try:
        ok = CliRunner().invoke(cli, ["profile", "models/ok.onnx", "-t", TARGET])
        stale = CliRunner().invoke(cli, ["profile", "models/stale.onnx", "-t", TARGET])
    finally:
        os.chdir(cwd)
    assert ok.exit_code == 0, ok.stdout + ok.stderr
    assert_clean_exit(stale, 2, "tensor 'c': the file stores shape [1, 16, 110, 110] but its "
                                "inputs give [1, 16, 222, 222]")
    assert len(calls) >= 2 and not any(str(repo.path) in src for src in calls)
    assert fingerprint(repo) == before


def test_a_weight_with_negative_dims_is_an_error_not_zero_bytes(tmp_path: Path) -> None:
    import onnx

    repo = make_repo(tmp_path)
    proto = fc_model(200)
    proto.graph.initializer[0].dims[0] = -proto.graph.initializer[0].dims[0]
    onnx.save(proto, repo.path / "models/a.onnx")
    repo.commit("negative dims")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, "has a negative dim")
    assert fingerprint(repo) == before


FOUR_BILLION = 4_000_000_000


def _const(name: str, value: object, dtype: type = np.int64) -> onnx.NodeProto:
    return helper.make_node("Constant", [], [name], name=f"const_{name}",
                            value=numpy_helper.from_array(np.array(value, dtype), name))


def _vector_nodes(kind: str, count: int) -> list[onnx.NodeProto]:
    """Nodes building the 1-D vector ``v`` of ``count`` elements from constants."""
    builders = {
        "Range": [_const("start", 0), _const("limit", count), _const("delta", 1),
                  helper.make_node("Range", ["start", "limit", "delta"], ["v"], name="big")],
        "ConstantOfShape": [_const("shp", [count]),
                            helper.make_node("ConstantOfShape", ["shp"], ["v"], name="big")],
        "Expand": [_const("one", [1.0], np.float32), _const("shp", [count]),
                   helper.make_node("Expand", ["one", "shp"], ["v"], name="big")],
        "Tile": [_const("one", [1.0], np.float32), _const("rep", [count]),
                 helper.make_node("Tile", ["one", "rep"], ["v"], name="big")],
    }
    return builders[kind]


def with_vector(kind: str, count: int) -> onnx.ModelProto:
    """MatMul [1, 64] x [64, 64] (costed work) plus the sum of a 1-D vector of ``count``
    elements read through Cast, an op onnx shape inference propagates values through
    (``OpSchema.has_data_propagation_function``). ``kind``: the op that builds the vector
    from constants, ``If`` (a Range inside an If branch) or ``input`` (a declared input)."""
    from tests.loadkit import model, vi, weight

    def summed(nodes: list[onnx.NodeProto], out: str) -> list[onnx.NodeProto]:
        return [*nodes, helper.make_node("Cast", ["v"], ["vf"], name="cast", to=TensorProto.FLOAT),
                helper.make_node("ReduceSum", ["vf"], [out], name="sum", keepdims=0)]

    inputs = [vi("x", [1, 64])]
    if kind == "computed":  # limit = (x's dim 1) * count / 64: known only by evaluating shapes
        inputs.append(vi("z", [1, 64]))
        extra = summed([helper.make_node("Shape", ["z"], ["zs"], name="zshape"),
                        _const("one", 1), _const("k", count // 64), _const("start", 0),
                        _const("delta", 1),
                        helper.make_node("Gather", ["zs", "one"], ["n"], name="dim1", axis=0),
                        helper.make_node("Mul", ["n", "k"], ["limit"], name="times"),
                        helper.make_node("Range", ["start", "limit", "delta"], ["v"],
                                         name="big")], "s")
    elif kind == "input":
        inputs.append(vi("v", [count], TensorProto.INT64))
        extra = summed([], "s")
    elif kind == "If":
        body = helper.make_graph(summed(_vector_nodes("Range", count), "t"), "then", [],
                                 [vi("t", [])])
        other = helper.make_graph([_const("e", 0.0, np.float32)], "else", [], [vi("e", [])])
        extra = [_const("cond", True, np.bool_),
                 helper.make_node("If", ["cond"], ["s"], name="branch", then_branch=body,
                                  else_branch=other)]
    else:
        extra = summed(_vector_nodes(kind, count), "s")
    nodes = [helper.make_node("MatMul", ["x", "w"], ["h"], name="mm"), *extra,
             helper.make_node("Add", ["h", "s"], ["y"], name="add")]
    return model(nodes, inputs, [vi("y", None)], [weight("w", [64, 64])])


# roofgate's entry point under a 2 GiB address-space cap (its git children inherit it), saying
# its own peak resident size (ru_maxrss, KiB on Linux) on stderr as it exits.
CAPPED = """
import atexit, resource, sys
resource.setrlimit(resource.RLIMIT_AS, (2 * 1024**3, 2 * 1024**3))
atexit.register(lambda: print("peak-kib", resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                              file=sys.stderr))
from gate.cli import main
main()
"""


def run_cli_in_2_gib(repo: Repo, *args: str) -> tuple[subprocess.CompletedProcess[str], int]:
    """``roofgate ARGS`` capped at 2 GiB, and its peak resident KiB. The peak is what tells a
    guard that works from one that does not: under the cap onnx's allocation failure may be
    caught as a MemoryError and the run go on, but only after it used the whole cap."""
    env = {**os.environ, "PYTHONPATH": str(WORKTREE)}
    done = subprocess.run([sys.executable, "-c", CAPPED, *args], cwd=repo.path, env=env,
                          capture_output=True, text=True, check=False, timeout=300)
    peaks = [int(line.split()[1]) for line in done.stderr.splitlines()
             if line.startswith("peak-kib ")]
    assert peaks, done.stdout + done.stderr  # the process exited (no crash)
    return done, peaks[0]


@pytest.mark.parametrize("kind, needle", [
    ("Range", "node 'big' (Range) makes a 1-D tensor of 4,000,000,000 elements"),
    ("ConstantOfShape", "node 'big' (ConstantOfShape) makes a 1-D tensor of 4,000,000,000"),
    ("Expand", "node 'big' (Expand) makes a 1-D tensor of 4,000,000,000 elements"),
    ("Tile", "node 'big' (Tile) makes a 1-D tensor of 4,000,000,000 elements"),
    ("If", "node 'big' (Range) makes a 1-D tensor of 4,000,000,000 elements"),
    ("input", "node 'cast' (Cast) reads a 1-D tensor of 4,000,000,000 elements"),
])
def test_a_vector_of_billions_built_from_constants_is_refused_in_bounded_memory(
        tmp_path: Path, kind: str, needle: str) -> None:
    """Without the guard, onnx data propagation holds such a vector element by element (it
    took ~24 GB on a Range of 4e9 and crashed under this cap)."""
    from tests.loadkit import save

    repo = make_repo(tmp_path)
    save(with_vector(kind, FOUR_BILLION), repo.path / "models/vec.onnx")
    repo.commit("a model with a huge constant-built vector")
    before = fingerprint(repo)
    done, peak_kib = run_cli_in_2_gib(repo, "check", "--base", "main")
    assert done.returncode == 2, done.stdout + done.stderr
    assert peak_kib < 1024**2  # under 1 GiB
    (line,) = [ln for ln in done.stdout.splitlines() if needle in ln]  # the summary's one line
    assert line.startswith("  ERROR  models/vec.onnx: ")
    assert "above the limit of 1,048,576" in line and "Traceback" not in done.stderr
    assert fingerprint(repo) == before


def test_a_vector_sized_by_shape_arithmetic_is_left_unsized_in_bounded_memory(
        tmp_path: Path) -> None:
    """The Range limit is computed from a shape (gate/model/shape_values evaluates it to 4e9
    and would hand it to inference as a constant): that round of inference is skipped, the
    vector stays unsized and is reported as such, within the memory cap."""
    from tests.loadkit import save

    repo = make_repo(tmp_path)
    save(with_vector("computed", FOUR_BILLION), repo.path / "models/vec.onnx")
    repo.commit("a model whose vector length comes from shape arithmetic")
    done, peak_kib = run_cli_in_2_gib(repo, "profile", "models/vec.onnx", "-t", TARGET)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "starting at node 'big' (Range, output 'v')" in done.stdout + done.stderr
    assert peak_kib < 1024**2  # under 1 GiB (without the guard: the whole cap, then on)


def test_a_small_constant_built_vector_still_passes_in_bounded_memory(tmp_path: Path) -> None:
    from tests.loadkit import save

    repo = make_repo(tmp_path)
    save(with_vector("Range", 1000), repo.path / "models/vec.onnx")
    repo.commit("a model with a small constant-built vector")
    done, peak_kib = run_cli_in_2_gib(repo, "check", "--base", "main")
    assert done.returncode == 0, done.stdout + done.stderr
    assert peak_kib < 1024**2


# --- 5. exit codes and processes ---------------------------------------------------------

# roofgate's own entry point, with every analysis slowed to a crawl after it says it started
# (a marker file per worker process), so a signal surely arrives while workers are busy.
SLOW_AUDIT = """
import os, sys, time
import gate.jobs as jobs
markers = sys.argv[1]
def crawl(job):
    open(os.path.join(markers, f"worker-{os.getpid()}"), "w").close()
    time.sleep(600)
jobs.analyse_job = crawl
sys.argv = ["roofgate", *sys.argv[2:]]
from gate.cli import main
main()
"""


def _wait_for(condition, what: str) -> None:
    """Poll ``condition`` (a generous deadline only guards against a hang; nothing is timed)."""
    import time

    deadline = time.monotonic() + 60
    while not condition():
        assert time.monotonic() < deadline, f"gave up waiting for {what}"
        time.sleep(0.05)


def _gone(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    return False


@pytest.mark.parametrize("signum, code", [(2, 130), (15, 143)])  # SIGINT, SIGTERM
def test_a_signal_ends_the_run_and_its_workers(tmp_path: Path, signum: int, code: int) -> None:
    repo = make_repo(tmp_path)
    for index in range(4):
        save_model(fc_model(64 + index), repo.path / f"models/m{index}.onnx")
    repo.commit("four models")
    markers = tmp_path / "markers"
    markers.mkdir()
    before = fingerprint(repo)
    env = {**os.environ, "PYTHONPATH": str(WORKTREE)}
    run = subprocess.Popen([sys.executable, "-c", SLOW_AUDIT, str(markers), "audit", "-j", "2"],
                           cwd=repo.path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           text=True)
    try:
        _wait_for(lambda: len(list(markers.iterdir())) == 2 or run.poll() is not None,
                  "both workers to start")
        workers = [int(p.name.split("-")[1]) for p in markers.iterdir()]
        run.send_signal(signum)
        out, err = run.communicate(timeout=120)
    finally:  # never leave a process behind, even when the test fails
        for pid in [int(p.name.split("-")[1]) for p in markers.iterdir()]:
            if not _gone(pid):
                os.kill(pid, 9)
        if run.poll() is None:
            run.kill()
            run.communicate()
    assert run.returncode == code, (out, err)
    assert "Traceback" not in err
    if signum == 2:
        assert "interrupted" in err
    _wait_for(lambda: all(_gone(pid) for pid in workers), "the workers to end")
    assert reports(repo) == {}  # nothing half-written, nothing that reads as a result
    assert fingerprint(repo) == before


def test_bad_numbers_are_bad_input_not_internal_errors(tmp_path: Path) -> None:
    huge = "9" * 400
    repo = make_repo(tmp_path, CONFIG + "dims: {batch: 1}\n", {
        "policies/huge.yaml": POLICY.replace("max_increase_pct: 10", f"max_increase_pct: {huge}"),
        "policies/tagged.yaml": POLICY.replace("rules:", "rules: !!python/object/apply:os.system"),
    })
    save_model(fc_model(200), repo.path / "models/a.onnx")
    repo.commit("shrink")
    before = fingerprint(repo)
    cases = [
        (["-p", "policies/huge.yaml"], "a 400-digit number is too large"),
        (["-p", "policies/tagged.yaml"], ("tag 'tag:yaml.org,2002:python/object/apply:os.system' "
                                         "is not supported")),
        (["--dim", f"batch={2**63}"], "up to 9223372036854775807"),
        (["--dim", f"batch={huge}"], "up to 9223372036854775807"),
    ]
    for args, message in cases:
        result = check(repo, *args)
        assert_clean_exit(result, 2, message)
    assert fingerprint(repo) == before


def test_a_full_stdout_device_is_exit_2_with_a_message(tmp_path: Path) -> None:
    if not Path("/dev/full").exists():
        pytest.skip("no /dev/full on this system")
    repo = make_repo(tmp_path)
    env = {**os.environ, "PYTHONPATH": str(WORKTREE)}
    for args in (["profile", "models/a.onnx", "-t", TARGET, "--format", "json"],
                 ["check", "--base", "main", "--json", "-"]):
        with open("/dev/full", "w") as full:
            done = subprocess.run([sys.executable, "-c", "from gate.cli import main; main()",
                                   *args], cwd=repo.path, env=env, stdout=full,
                                  stderr=subprocess.PIPE, text=True, check=False)
        assert done.returncode == 2, done.stderr
        assert "No space left on device" in done.stderr and "Traceback" not in done.stderr


def test_audit_does_not_follow_links_out_of_the_repository(tmp_path: Path) -> None:
    outside = tmp_path / "outside"
    save_model(fc_model(2048), outside / "secret.onnx")
    repo = make_repo(tmp_path, f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n")
    os.symlink(outside / "secret.onnx", repo.path / "models/linked.onnx")
    os.symlink(outside, repo.path / "models/linked-folder")
    repo.commit("links out of the repository")
    before = fingerprint(repo)
    for link in ("models/linked.onnx", "models/linked-folder"):
        others = {"models/linked.onnx", "models/linked-folder"} - {link}
        moved = {name: repo.path / name for name in others}
        for name, path in moved.items():  # one link at a time
            path.rename(tmp_path / Path(name).name)
        result = run_cli(repo, "audit", "--json", f"{REPORT_DIR}/audit.json")
        for name, path in moved.items():
            (tmp_path / Path(name).name).rename(path)
        if link == "models/linked-folder":  # never walked into: only models/a.onnx audited
            assert result.returncode == 0, result.stdout + result.stderr
            data = json.loads((repo.path / REPORT_DIR / "audit.json").read_text())
            assert {e["model"] for e in data["result"]["entries"]} == {"models/a.onnx"}
            continue
        assert result.returncode == 2, result.stdout + result.stderr
        assert "a link leading out of the repository" in result.stderr and link in result.stderr
        assert "Traceback" not in result.stderr
        assert reports(repo) == {}
    assert fingerprint(repo) == before


def test_a_link_to_nothing_is_never_skipped_unseen(tmp_path: Path) -> None:
    """A model committed as a link whose content was never fetched (git-annex leaves a link
    into .git/annex; a moved target leaves one to nowhere) was left out of the walk as
    "not a file": the audit passed without it. It now fails closed, naming the link."""
    repo = make_repo(tmp_path, f"targets: [{TARGET}]\npolicies: [policies/gate.yaml]\n")
    os.symlink("../.git/annex/objects/Xq/SHA256E-s1--00.onnx", repo.path / "models/annexed.onnx")
    repo.commit("a model whose content was not fetched")
    audited = run_cli(repo, "audit", "--json", f"{REPORT_DIR}/audit.json")
    assert audited.returncode == 2, audited.stdout + audited.stderr
    assert "models/annexed.onnx: a link to a missing file" in audited.stdout
    data = json.loads((repo.path / REPORT_DIR / "audit.json").read_text())
    assert [e["model"] for e in data["result"]["errors"]] == ["models/annexed.onnx"]
    evaluated = run_cli(repo, "evaluate", "models/annexed.onnx")
    assert evaluated.returncode == 2 and "a link to a missing file" in evaluated.stdout
    os.remove(repo.path / "models/annexed.onnx")
    os.symlink(tmp_path / "moved-away.onnx", repo.path / "models/dangling.onnx")
    outside = run_cli(repo, "audit")
    assert outside.returncode == 2 and "a link leading out of the repository" in outside.stderr
    assert "Traceback" not in audited.stderr + evaluated.stderr + outside.stderr


# --- 1. rules come from the base -----------------------------------------------------------

WAIVER = """
waivers:
  - rule: latency-regression
    models: ["**"]
    reason: '{reason}'
    expires: {expires}
"""
HEAD_ATTACKS = {  # each lets the latency regression pass if the pull request's rules were used
    "loosened-policy": {"policies/gate.yaml": POLICY.replace("max_increase_pct: 10",
                                                              "max_increase_pct: 900")},
    "token-waiver": {"policies/gate.yaml": POLICY + WAIVER.format(reason=".",
                                                                  expires="2999-01-01")},
    "no-policies": {"roofgate.yaml": CONFIG.replace("policies: [policies/gate.yaml]",
                                                    "policies: []")},
    "exclude-all": {"roofgate.yaml": CONFIG + "exclude: ['**']\n"},
    "narrower-globs": {"roofgate.yaml": CONFIG.replace("models/**/*.onnx", "models/none/*.onnx")},
    "opt-in-from-head": {"roofgate.yaml": CONFIG + "rules_from: head\nexclude: ['**']\n"},
}
CHANGE_LINES = {
    "loosened-policy": "policies/gate.yaml: rule latency-regression loosened (max_change_pct "
                       "10.0 -> 900.0)",
    "token-waiver": "policies/gate.yaml: waiver for latency-regression on ** added (loosened",
    "no-policies": "roofgate.yaml: models[0].policies changed from ['policies/gate.yaml'] to []",
    "exclude-all": "roofgate.yaml: exclude changed from [] to ['**']",
    "narrower-globs": "roofgate.yaml: models[0].paths changed from ['models/**/*.onnx'] to "
                      "['models/none/*.onnx']",
    "opt-in-from-head": "roofgate.yaml: rules_from changed from 'base' to 'head'",
}


@pytest.mark.parametrize("attack", sorted(HEAD_ATTACKS))
def test_the_pull_request_cannot_loosen_its_own_gate(tmp_path: Path, attack: str) -> None:
    repo = make_repo(tmp_path)
    save_model(fc_model(900), repo.path / "models/a.onnx")  # 1 MiB -> 3.5 MiB of weights: slower
    for rel, text in HEAD_ATTACKS[attack].items():
        repo.write(rel, text)
    repo.commit(f"regress, and {attack}")
    before = fingerprint(repo)
    result = check(repo, *EVERY_REPORT)
    assert_clean_exit(result, 1, "latency-regression")
    lines = result.stdout.splitlines()
    assert lines[1] == "BLOCKED by 1 rule:"  # what blocks leads; where the rules came from next
    assert lines[3].startswith("  rules: Rules from the merge base")
    assert_rules_section(reports(repo), result.stdout, CHANGE_LINES[attack], side="base")
    written = reports(repo)
    assert json.loads(written["result.json"])["result"]["policies"] == ["policies/gate.yaml"]
    assert fingerprint(repo) == before


EVERY_REPORT = ("--junit", f"{REPORT_DIR}/junit.xml", "--markdown", f"{REPORT_DIR}/summary.md",
                "--json", f"{REPORT_DIR}/result.json", "--sarif", f"{REPORT_DIR}/gate.sarif",
                "--html", f"{REPORT_DIR}/r.html")


def assert_rules_section(written: dict[str, str], stdout: str, change: str, side: str) -> None:
    """Every report carries the rules section (its own heading, not a run note) and the
    change line; machine formats say which side's rules judged the run."""
    from xml.etree import ElementTree

    from gate.report.text import md_escape

    heading = "Rules changed in this pull request"
    assert f"{heading} (" in stdout and f"  - {change}" in stdout
    assert "note: Rules" not in stdout  # a section, no longer run notes
    assert f"#### {heading}" in written["summary.md"] 
    assert f"- {md_escape(change)}" in written["summary.md"]
    document = json.loads(written["result.json"])["result"]
    assert document["rules_source"]["side"] == side
    assert any(line.startswith(change) for line in document["rules_source"]["changes"])
    assert not any("Rules" in note for note in document["notes"])
    suite = ElementTree.fromstring(written["junit.xml"]).find("testsuite")
    assert suite is not None
    properties = {p.get("name"): p.get("value") for p in suite.iter("property")}
    assert properties["rules_from"] == side and int(properties["rules_changed"]) >= 1
    assert change in (suite.findtext("system-out") or "")
    run = json.loads(written["gate.sarif"])["runs"][0]
    assert run["properties"]["rulesSource"]["side"] == side
    texts = [n["message"]["text"] for n in run["invocations"][0]["toolExecutionNotifications"]]
    assert any(change in text for text in texts)
    assert "id=\"rules-changed\"" in written["r.html"] and heading in written["r.html"]


def test_moving_a_model_out_of_the_globs_keeps_it_gated(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    save_model(fc_model(128), repo.path / "models/b.onnx")  # the glob keeps matching a file
    repo.commit("a second model")
    repo.git("branch", "-f", "main")
    repo.git("mv", "models/a.onnx", "elsewhere.onnx")
    save_model(fc_model(900), repo.path / "elsewhere.onnx")
    repo.commit("move out of the globs and regress")
    result = check(repo)
    assert_clean_exit(result, 1, "latency-regression")


def test_a_committed_baseline_is_read_at_the_base(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    cwd = os.getcwd()
    os.chdir(repo.path)
    try:
        made = CliRunner().invoke(cli, ["baseline", "models/a.onnx", "-t", TARGET, "-o",
                                        "baseline.json"])
        assert made.exit_code == 0, made.stderr
        repo.commit("baseline")
        repo.git("branch", "-f", "main")
        save_model(fc_model(900), repo.path / "models/a.onnx")
        refreshed = CliRunner().invoke(cli, ["baseline", "models/a.onnx", "-t", TARGET, "-o",
                                             "baseline.json"])
        assert refreshed.exit_code == 0, refreshed.stderr
    finally:
        os.chdir(cwd)
    repo.commit("regress and refresh the committed baseline")
    result = check(repo, "--baseline", "baseline.json")
    assert_clean_exit(result, 1, "latency-regression")
    assert "baseline.json: the committed baseline snapshot changed" in result.stdout


def test_the_base_may_opt_into_head_rules_and_the_reports_say_so(tmp_path: Path) -> None:
    repo = make_repo(tmp_path, CONFIG + "rules_from: head\n")
    save_model(fc_model(900), repo.path / "models/a.onnx")
    repo.write("policies/gate.yaml", HEAD_ATTACKS["loosened-policy"]["policies/gate.yaml"])
    repo.commit("regress and loosen, with the base's consent")
    result = check(repo, *EVERY_REPORT)
    assert result.exit_code == 0, result.stdout + result.stderr
    first_note = result.stdout.splitlines()[1]
    assert "Rules from this pull request" in first_note and "rules_from: head" in first_note
    written = reports(repo)
    markdown = written["summary.md"]
    assert markdown.index("Rules from this pull request") < markdown.index("models/a.onnx")
    assert "Warning: the pull request's own rules judge it" in markdown.splitlines()[4]
    assert "(they judge this run)" in markdown
    assert_rules_section(written, result.stdout, CHANGE_LINES["loosened-policy"], side="head")
    html = written["r.html"]
    assert html.index("id=\"rules-source\"") < html.index("id=\"rules-changed\"")


@pytest.mark.parametrize("reason, expires, config_extra, message", [
    (".", "{soon}", "", "the reason '.' is too short"),
    ("owner: vision team, until the v3 backbone", "2999-01-01", "", "more than 90 days after"),
    ("owner: vision team, until the v3 backbone", "{in_200_days}", "waiver_horizon_days: 365\n",
     ""),
])
def test_waivers_need_a_real_reason_and_a_near_expiry(tmp_path: Path, reason: str, expires: str,
                                                      config_extra: str, message: str) -> None:
    from datetime import datetime, timedelta, timezone

    today = datetime.now(timezone.utc).date()
    dates = {"soon": today + timedelta(days=30), "in_200_days": today + timedelta(days=200)}
    policy = POLICY + WAIVER.format(reason=reason, expires=expires.format(**dates))
    repo = make_repo(tmp_path, CONFIG + config_extra, {"policies/gate.yaml": policy})
    save_model(fc_model(900), repo.path / "models/a.onnx")
    repo.commit("regress under a waiver")
    before = fingerprint(repo)
    result = check(repo)
    if message:
        assert_clean_exit(result, 2, message)
        assert "policies/gate.yaml" in result.stderr
    else:
        assert result.exit_code == 0, result.stdout + result.stderr  # waived, as the base says
    assert fingerprint(repo) == before


@pytest.mark.parametrize("command", [("evaluate", "models/a.onnx"), ("audit",)])
@pytest.mark.parametrize("reason, expires, message", [
    (".", "{soon}", "the reason '.' is too short"),
    ("owner: vision team, until the v3 backbone", "2999-01-01", "more than 90 days after"),
    ("owner: vision team, until the v3 backbone", "{soon}", ""),
])
def test_evaluate_and_audit_hold_waivers_to_the_same_limits(
        tmp_path: Path, command: tuple[str, ...], reason: str, expires: str,
        message: str) -> None:
    """The waiver limits are checked where every run loads its policies, not only in check."""
    from datetime import datetime, timedelta, timezone

    soon = datetime.now(timezone.utc).date() + timedelta(days=30)
    policy = POLICY.replace("kind: fits_in_buffer", "kind: fits_in_buffer, severity: error")
    policy += WAIVER.format(reason=reason, expires=expires.format(soon=soon)).replace(
        "latency-regression", "params-fit-buffer")
    repo = make_repo(tmp_path, extra={"policies/gate.yaml": policy})
    save_model(fc_model(4096, in_features=2048), repo.path / "models/a.onnx")  # 32 MiB > 4 MiB
    repo.commit("a model too big for the buffer, under a waiver")
    before = fingerprint(repo)
    result = run_cli(repo, *command)
    if message:
        assert result.returncode == 2, result.stdout + result.stderr
        assert message in result.stderr and "policies/gate.yaml:" in result.stderr
        assert "Traceback" not in result.stderr
    else:  # the same waiver within the limits waives the failing rule
        assert result.returncode == 0, result.stdout + result.stderr
        assert "waived" in result.stdout.lower()
    assert fingerprint(repo) == before


# --- 3. renames git does not pair, submodule bumps -----------------------------------------

def mlp(last_features: int, prefix: str):
    """Gemm 1024->512, Relu, Gemm 512->512, Relu, Gemm 512->last: 2 + 1 MiB + the last layer."""
    builder = NetBuilder("mlp", weights="external")
    x = builder.input("x", [1, 1024])
    for index, width in enumerate((512, 512)):
        x = builder.activation(builder.gemm(x, width, name=f"{prefix}{index}"), "relu",
                               name=f"{prefix}act{index}")
    builder.output(builder.gemm(x, last_features, name=f"{prefix}last"))
    return builder.build()


def test_a_rename_with_a_re_export_is_still_compared_with_the_old_model(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    save_model(mlp(256, "fc"), repo.path / "models/mlp.onnx")
    repo.commit("an mlp")
    repo.git("branch", "-f", "main")
    (repo.path / "models/mlp.onnx").unlink()
    reexported = mlp(900, "dense_")  # another exporter's names; the last layer grew
    reexported.graph.name = "re-exported"
    save_model(reexported, repo.path / "models/renamed/b.onnx")
    repo.commit("rename and re-export")
    statuses = repo.git("diff", "--name-status", "-M", "main", "HEAD").split()
    assert "D" in statuses and "A" in statuses  # git does not pair them
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 1, "latency-regression")
    assert ("models/mlp.onnx was renamed to models/renamed/b.onnx (git saw a deletion and an "
            "addition; their layers match)") in result.stdout
    assert fingerprint(repo) == before


MANY_FILES = 1001  # git's default diff.renameLimit is 1000: past 1000 x 1000 candidates it
# skips inexact rename detection with only a warning (git-diff(1), diff.renameLimit; from memory)


@pytest.mark.slow
def test_renames_are_followed_in_a_pull_request_with_over_a_thousand_files(
        tmp_path: Path) -> None:
    """1001 files moved and edited, a model moved and regressed (git pairs it only when its
    rename limit is lifted: the layer shapes differ, so layer structure would not), and a
    model renamed and re-exported (git never pairs it; gate/renames.py does)."""
    repo = make_repo(tmp_path)
    for k in range(MANY_FILES):
        repo.write(f"data/f{k}.txt", f"record {k}\nshared text shared text shared\n")
    save_model(mlp(256, "fc"), repo.path / "models/mlp.onnx")
    repo.commit("data and an mlp")
    repo.git("branch", "-f", "main")
    for k in range(MANY_FILES):
        (repo.path / f"data/f{k}.txt").unlink()
        repo.write(f"data2/g{k}.txt", f"record {k}\nshared text shared text shared\nedit {k}\n")
    (repo.path / "models/a.onnx").unlink()
    save_model(fc_model(900), repo.path / "models/moved/a.onnx")
    (repo.path / "models/mlp.onnx").unlink()
    save_model(mlp(900, "dense_"), repo.path / "models/renamed/b.onnx")
    repo.commit("move everything, regress two models")
    default = subprocess.run(["git", "diff", "--name-status", "-M", "main", "HEAD"],
                             cwd=repo.path, capture_output=True, text=True, check=True)
    assert "rename detection was skipped" in default.stderr  # the situation is real
    assert "R" not in {line[:1] for line in default.stdout.splitlines()}
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 1, "latency-regression")
    assert "models/a.onnx was renamed to models/moved/a.onnx; compared with the old file." \
        in result.stdout
    assert ("models/mlp.onnx was renamed to models/renamed/b.onnx (git saw a deletion and an "
            "addition; their layers match)") in result.stdout
    blocked = [line for line in result.stdout.splitlines() if "rule latency-regression" in line]
    assert {"models/moved/a.onnx", "models/renamed/b.onnx"} == {
        line.split()[1] for line in blocked if line.split()[1].startswith("models/")}
    assert fingerprint(repo) == before


@pytest.mark.parametrize("attributes, filtered_differs", [
    ("*.onnx text eol=crlf", True),  # LF -> CRLF on the way out (gitattributes(5), eol)
    ("*.onnx filter=rot -text", True),  # a smudge filter the repository configures
    ("models/** text", False),  # LF stays LF on Linux checkouts; only adding would convert
])
def test_attributes_added_by_the_pull_request_never_touch_the_base_side(
        tmp_path: Path, attributes: str, filtered_differs: bool) -> None:
    """The PR regresses the model, then adds .gitattributes declaring models text (LF -> CRLF
    on the way out of git) or a filter. Both sides are read as git stores them (cat-file,
    no filters, no attributes), so the base is the model it was and the regression rule
    applies; through the filters the base would be corrupted (the negative control)."""
    repo = make_repo(tmp_path)
    repo.git("config", "filter.rot.smudge", "tr a-z n-za-m")
    repo.git("config", "filter.rot.clean", "tr a-z n-za-m")
    raw_base = (repo.path / "models/a.onnx").read_bytes()
    save_model(fc_model(900), repo.path / "models/a.onnx")
    repo.commit("regress")
    repo.write(".gitattributes", attributes + "\n")
    repo.git("add", ".gitattributes")  # only it: re-adding the model would normalise it too
    repo.git("commit", "-q", "-m", "declare the models text")
    filtered = subprocess.run(["git", "cat-file", "--filters", "main:models/a.onnx"],
                              cwd=repo.path, capture_output=True, check=True).stdout
    assert b"\n" in raw_base and (filtered != raw_base) is filtered_differs
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 1, "latency-regression")
    assert "judged as new" not in result.stdout + result.stderr
    entry = json.loads(reports(repo)["result.json"])["result"]["entries"][0]
    assert entry["base"] is not None and entry["model"] == "models/a.onnx"
    assert fingerprint(repo) == before


def test_a_submodule_bump_where_models_live_is_refused_with_a_note(tmp_path: Path) -> None:
    repo = make_repo(tmp_path)
    old, new = "1" * 40, "2" * 40
    repo.git("update-index", "--add", "--cacheinfo", f"160000,{old},models/vendor")
    repo.git("commit", "-q", "-m", "vendor models as a submodule")
    repo.git("branch", "-f", "main")
    repo.git("update-index", "--cacheinfo", f"160000,{new},models/vendor")
    repo.git("commit", "-q", "-m", "bump the vendor models")
    before = fingerprint(repo)
    result = check(repo)
    assert_clean_exit(result, 2, "models/vendor: submodule moved from 111111111111 to "
                                 "222222222222; check does not read models inside submodules")
    assert json.loads(reports(repo)["result.json"])["exit_code"] == 2
    assert fingerprint(repo) == before
