"""The CI files' steps, run locally the way a runner runs them, on real git repositories.

Each test builds a bare ``origin`` and clones it as CI does (actions/checkout with
full history; GitLab's single-branch clone; a fork's branch), then runs the steps of
action.yml, the example workflows and the GitLab example with the environment the
runner would give them (``GITHUB_OUTPUT``, ``GITHUB_BASE_REF``, merge-queue base, ...).
Models are built in code; Gemm parameter bytes are in x out x 4 (fp32) plus the bias
(ONNX operator spec, Gemm), so a 1024 x 1536 layer (6 MiB) overflows the 4 MiB
parameter buffer of ws-64x64-4mib and a 1024 x 256 one (1 MiB) fits.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any, ClassVar

import pytest

from gate.synth.builder import save_model
from gate.synth.layers import NetBuilder
from tests.gitkit import GIT_ENV, Repo
from tests.workflowkit import (
    ROOT,
    github_env,
    load,
    outputs,
    roofgate_bin,
    run_shell,
    step_named,
)

TARGET = "ws-64x64-4mib"
POLICY = """\
version: 1
name: team
rules:
  - id: params-fit-buffer
    kind: fits_in_buffer
    check: params
  - id: latency-regression
    kind: max_regression
    metric: latency_s
    max_increase_pct: 10
"""
needs_lfs = pytest.mark.skipif(
    subprocess.run(["git", "lfs", "version"], capture_output=True, check=False).returncode != 0,
    reason="git-lfs is not installed (apt-get install git-lfs; .ci/run installs it in CI)")


def fc(out_features: int) -> Any:
    b = NetBuilder("fc", weights="external")
    x = b.input("x", [1, 1024])
    b.output(b.gemm(x, out_features, name="fc"))
    return b.build()


def git(cwd: Path, *args: str) -> str:
    done = subprocess.run(["git", "-c", "core.hooksPath=/dev/null", *args], cwd=cwd,
                          env={**os.environ, **GIT_ENV, "HOME": str(cwd)}, capture_output=True,
                          text=True, check=True)
    return done.stdout.strip()


def make_origin(tmp: Path, *, lfs: bool = False) -> Path:
    """A bare origin: main with two models, a `pr` branch that grows one past the buffer,
    and one more commit on main after the branch was cut (so base tip != merge base)."""
    work = Repo(tmp / "author")
    if lfs:
        work.git("lfs", "install", "--local", "--skip-repo")
        work.write(".gitattributes", "*.onnx filter=lfs diff=lfs merge=lfs -text\n")
    work.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [policies/team.yaml]\n")
    work.write("policies/team.yaml", POLICY)
    save_model(fc(256), work.path / "models/a.onnx")
    save_model(fc(128), work.path / "models/b.onnx")
    work.commit("base")
    work.branch("pr")
    save_model(fc(1536), work.path / "models/a.onnx")
    work.commit("grow a past the parameter buffer")
    work.git("checkout", "-q", "main")
    save_model(fc(64), work.path / "models/b.onnx")
    work.commit("main moves on")
    bare = tmp / "origin.git"
    git(tmp, "init", "-q", "--bare", "-b", "main", str(bare))
    work.git("remote", "add", "origin", str(bare))
    work.git("push", "-q", "origin", "main", "pr")
    if lfs:  # the test repositories run no hooks, so push the LFS objects explicitly
        work.git("lfs", "push", "--all", "origin")
    return bare


def checkout(origin: Path, dest: Path, branch: str = "pr", *extra: str,
             env: dict[str, str] | None = None) -> Path:
    """Clone as actions/checkout with fetch-depth 0 does: all branches, HEAD detached on ``branch``."""
    subprocess.run(["git", "clone", "-q", *extra, origin.as_uri(), str(dest)], check=True,
                   capture_output=True, env={**os.environ, **GIT_ENV, **(env or {})})
    git(dest, "checkout", "-q", "--detach", f"origin/{branch}")
    return dest


# --- the composite action, installed from its own files into a clean venv -------------------

def action_copy(tmp: Path) -> Path:
    """The action's files as a runner checks them out (a copy, so builds stay out of ROOT)."""
    dest = tmp / "action"
    for name in ("gate", ".github", "pyproject.toml", "README.md", "action.yml"):
        source = ROOT / name
        if source.is_dir():
            shutil.copytree(source, dest / name,
                            ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        else:
            shutil.copy2(source, dest / name)
    return dest


def expand(value: str, inputs: dict[str, str], event: dict[str, str]) -> str:
    """The few expressions action.yml's env uses: inputs.X, github.event.*, steps.*."""
    def one(match: re.Match[str]) -> str:
        expr = match.group(1).strip()
        if expr.startswith("inputs."):
            return inputs.get(expr[len("inputs."):], "")
        return event.get(expr, "")
    return re.sub(r"\$\{\{(.*?)\}\}", one, value)


def run_action(repo: Path, venv: dict[str, Path], inputs: dict[str, str],
               event: dict[str, str], extra_env: dict[str, str]) -> dict[str, Any]:
    """Run action.yml's steps after the install (done once by ``action_venv``) in order, as the
    runner would: each step's env expanded, later steps seeing earlier steps' outputs."""
    runner = venv["runner"] / f"job-{len(list(venv['runner'].glob('job-*')))}"
    runner.mkdir()
    spec = load(venv["action"] / "action.yml")
    defaults = {k: str(v.get("default", "")) for k, v in spec["inputs"].items()}
    inputs = {**defaults, **inputs, "token": ""}
    env = {**github_env(runner), "GITHUB_ACTION_PATH": str(venv["action"]), "PYTHONPATH": "",
           "PATH": f"{venv['bin']}{os.pathsep}{os.environ['PATH']}", **extra_env}
    results = {}
    for step in spec["runs"]["steps"][1:]:
        event = {**event, "steps.check.outputs.exit-code": outputs(env).get("exit-code", "")}
        step_env = {k: expand(str(v), inputs, event) for k, v in step.get("env", {}).items()}
        results[step.get("id", step["name"])] = run_shell(step["run"], repo, {**env, **step_env})
    return {"steps": results, "outputs": outputs(env),
            "summary": Path(env["GITHUB_STEP_SUMMARY"]).read_text()}


@pytest.fixture(scope="module")
def action_venv(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The action's install step, run once: a clean venv (--system-site-packages, so the
    dependencies come from this machine and no network is needed) with roofgate built from
    the action's own files."""
    tmp = tmp_path_factory.mktemp("action")
    action, runner = action_copy(tmp), tmp / "runner"
    runner.mkdir()
    env = {**github_env(runner), "GITHUB_ACTION_PATH": str(action), "PYTHONPATH": "",
           "ROOFGATE_PYTHON": sys.executable, "ROOFGATE_VENV_ARGS": "--system-site-packages",
           "ROOFGATE_PIP_ARGS": "--no-deps --no-index --no-build-isolation"}
    install = load(action / "action.yml")["runs"]["steps"][0]["run"]
    done = run_shell(install, tmp, env)
    assert done.returncode == 0, done.stderr
    bin_dir = Path(Path(env["GITHUB_PATH"]).read_text().strip())
    assert outputs(env)["scripts"] == str(action / ".github/scripts")
    where = subprocess.run([str(bin_dir / "python"), "-c", "import gate; print(gate.__file__)"],
                           capture_output=True, text=True, check=True, env={"PATH": ""},
                           cwd=tmp).stdout
    assert where.startswith(str(runner)), where  # roofgate runs from the venv, not the source
    return {"action": action, "runner": runner, "bin": bin_dir}


@pytest.mark.slow
def test_action_on_a_pull_request_blocks_and_writes_everything(action_venv: dict[str, Path],
                                                               tmp_path: Path) -> None:
    repo = checkout(make_origin(tmp_path), tmp_path / "ws")
    done = run_action(repo, action_venv, {}, {"github.event.pull_request.number": "17"},
                      {"GITHUB_BASE_REF": "main"})
    check = done["steps"]["check"]
    assert done["outputs"]["exit-code"] == "1", check.stdout + check.stderr
    out = repo / done["outputs"]["report-dir"]
    assert (out / "junit.xml").is_file() and (out / "result.json").is_file()
    assert (out / "pr-number.txt").read_text() == "17\n"
    assert "::error file=models/a.onnx" in check.stdout  # annotations on the PR's file
    assert "params-fit-buffer" in done["summary"]  # the job summary got the markdown
    assert done["steps"]["Gate (exit with roofgate's code)"].returncode == 1
    # the merge base, not main's tip: b.onnx changed on main later and is not blamed
    assert "models/b.onnx" not in (out / "junit.xml").read_text()


@pytest.mark.slow
def test_action_in_a_merge_queue_and_without_any_base(action_venv: dict[str, Path],
                                                      tmp_path: Path) -> None:
    origin = make_origin(tmp_path)
    repo = checkout(origin, tmp_path / "ws")
    base = git(repo, "rev-parse", "origin/main")
    queued = run_action(repo, action_venv, {}, {"github.event.merge_group.base_sha": base}, {})
    assert queued["outputs"]["exit-code"] == "1"
    lost = run_action(repo, action_venv, {}, {}, {})
    assert lost["outputs"]["exit-code"] == "2"
    assert "set the action's base input" in lost["steps"]["check"].stderr
    assert lost["steps"]["Gate (exit with roofgate's code)"].returncode == 2


@pytest.mark.slow
def test_action_inputs_replace_policy_and_report_folder(action_venv: dict[str, Path],
                                                        tmp_path: Path) -> None:
    repo = checkout(make_origin(tmp_path), tmp_path / "ws")
    done = run_action(repo, action_venv,
                      {"policy": "default\n", "report-dir": "gate reports", "annotations": "false"},
                      {}, {"GITHUB_BASE_REF": "main"})
    assert done["outputs"]["report-dir"] == "gate reports"
    junit = (repo / "gate reports" / "junit.xml").read_text()
    assert "coverage" in junit and "latency-regression" in junit  # the built-in default's ids
    assert "::error" not in done["steps"]["check"].stdout


# --- Git LFS: the fetch step brings the MERGE BASE's objects --------------------------------

@needs_lfs
@pytest.mark.slow
def test_lfs_fetch_step_fetches_the_merge_base_from_the_configured_server(
        tmp_path: Path) -> None:
    origin = make_origin(tmp_path, lfs=True)
    # actions/checkout with lfs: true brings the head's LFS objects only
    repo = checkout(origin, tmp_path / "ws", env={"GIT_LFS_SKIP_SMUDGE": "1"})
    git(repo, "lfs", "install", "--local", "--skip-repo")
    git(repo, "lfs", "pull")
    bin_dir = roofgate_bin(tmp_path / "bin")
    env = {"PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}", "GITHUB_BASE_REF": "main"}
    before = run_shell('roofgate check --base origin/main --json r.json', repo, env)
    said = before.stdout + before.stderr
    assert before.returncode == 2 and "base side is a Git LFS pointer" in said
    assert f"git lfs fetch origin {git(repo, 'merge-base', 'origin/main', 'HEAD')}" in said
    # The step, with a recording `git` in front: which commit, which server key.
    log = tmp_path / "git.log"
    shim = tmp_path / "shim"
    shim.mkdir()
    real_git = shutil.which("git")
    (shim / "git").write_text(f'#!/bin/sh\n[ "$1" = lfs ] && [ "$2" = fetch ] && printf "%s|%s\\n" '
                              f'"$GIT_CONFIG_KEY_0" "$*" >> {str(log)!r}\nexec {real_git!r} "$@"\n')
    (shim / "git").chmod(0o755)
    step = f'bash "{ROOT}/.github/scripts/lfs-fetch-base.sh"'  # as action.yml runs it
    fetched = run_shell(step, repo, {**env, "PATH": f"{shim}{os.pathsep}{env['PATH']}",
                                     "GITHUB_SERVER_URL": "https://ghe.example.test",
                                     "ROOFGATE_TOKEN": "t0ken"})
    assert fetched.returncode == 0, fetched.stderr
    merge_base = git(repo, "merge-base", "origin/main", "HEAD")
    assert log.read_text() == (f"http.https://ghe.example.test/.extraheader|lfs fetch origin "
                               f"{merge_base}\n")
    assert "t0ken" not in (repo / ".git" / "config").read_text()
    after = run_shell('roofgate check --base origin/main --json r.json', repo, env)
    assert after.returncode == 1, after.stderr  # both sides real: the grown layer fails


# --- the pre-commit hook -------------------------------------------------------------------

def test_pre_commit_hook_judges_the_staged_model(tmp_path: Path) -> None:
    hook = load(ROOT / ".pre-commit-hooks.yaml")
    (entry,) = [h["entry"] for h in hook if h["id"] == "roofgate-check"]
    repo = checkout(make_origin(tmp_path), tmp_path / "ws", "main")
    bin_dir = roofgate_bin(tmp_path / "bin")
    env = {"PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}"}
    assert run_shell(entry, repo, env).returncode == 0  # nothing staged
    save_model(fc(1536), repo / "models/b.onnx")  # grown in the working tree only
    assert run_shell(entry, repo, env).returncode == 0  # not staged: not judged
    git(repo, "add", "models/b.onnx")
    staged = run_shell(entry, repo, env)
    assert staged.returncode == 1 and "models/b.onnx" in staged.stdout + staged.stderr


# --- the nightly workflow: three nights, nothing but artifacts survives ---------------------

SHARDS = 1  # the shard deal and merge are tested in test_cli_check; one shard keeps this fast


class Artifacts:
    """The artifact store of a repository: run id -> artifact name -> folder."""

    def __init__(self, root: Path) -> None:
        self.root = root

    def put(self, run: int, name: str, files: list[Path]) -> None:
        dest = self.root / str(run) / name
        dest.mkdir(parents=True)
        for file in files:
            shutil.copy2(file, dest / file.name)

    def newest_with(self, name: str, before: int) -> int | None:
        """What the `baseline` job's script finds (its logic is tested in node separately)."""
        runs = sorted((int(p.name) for p in self.root.iterdir() if (p / name).is_dir()),
                      reverse=True) if self.root.exists() else []
        return next((r for r in runs if r < before), None)


def night(repo: Path, store: Artifacts, run: int, bin_dir: Path, *, first: bool = False,
          refresh: bool = False) -> tuple[int, str]:
    """One scheduled run of roofgate-nightly.yml: fresh workspace, shards, merge, gate."""
    workflow = load(ROOT / ".github/examples/roofgate-nightly.yml")
    env = {"PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}",
           "BASELINE_DIR": "roofgate-baseline", "ROOFGATE_OUT": "roofgate-out"}
    for stale in ("roofgate-baseline", "roofgate-out", "shards", "next-baseline"):
        shutil.rmtree(repo / stale, ignore_errors=True)  # every job starts clean: no cache
    found = store.newest_with("roofgate-baseline", run)
    shard_files = []
    for shard in range(1, SHARDS + 1):
        if found is not None:
            shutil.copytree(store.root / str(found) / "roofgate-baseline",
                            repo / "roofgate-baseline", dirs_exist_ok=True)
        step = step_named(workflow, "audit", "Audit this shard")["run"]
        done = run_shell(step, repo, {**env, "SHARD": str(shard), "SHARDS": str(SHARDS)})
        assert done.returncode == 0, done.stderr
        shard_files.append(repo / f"roofgate-out/shard-{shard}-of-{SHARDS}.json")
    (repo / "shards").mkdir()
    for file in shard_files:
        shutil.copy2(file, repo / "shards" / file.name)
    shutil.rmtree(repo / "roofgate-out")
    runner = repo.parent / f"runner-{run}"
    runner.mkdir()
    gh = github_env(runner)
    merge = step_named(workflow, "merge", "Merge")["run"]
    done = run_shell(merge, repo, {**env, **gh, "BASELINE_RUN": "" if found is None else str(
        found), "FIRST_RUN": str(first).lower(), "REFRESH": str(refresh).lower()})
    assert done.returncode == 0, done.stderr
    result = outputs(gh)
    if result["store_baseline"] == "true":
        store.put(run, "roofgate-baseline", [repo / "next-baseline/snapshot.json"])
    summary = (repo / "roofgate-out/summary.md").read_text()
    gate = step_named(workflow, "merge", "Gate")["run"]
    code = run_shell(gate, repo, {"CODE": result["exit_code"]}).returncode
    return code, done.stdout + done.stderr + summary


@pytest.mark.slow
def test_three_nights_a_regression_is_reported_until_the_baseline_is_refreshed(
        tmp_path: Path) -> None:
    repo = checkout(make_origin(tmp_path), tmp_path / "ws", "main")
    (repo / "roofgate.yaml").write_text(f"targets: [{TARGET}]\npolicies: [policies/team.yaml]\n"
                                        "exclude: ['roofgate-*/**']\n")
    store, bin_dir = Artifacts(tmp_path / "artifacts"), roofgate_bin(tmp_path / "bin")

    code, text = night(repo, store, 1, bin_dir)  # no baseline, not declared first: loud
    assert code == 2 and "no baseline snapshot from an earlier night" in text
    code, text = night(repo, store, 2, bin_dir, first=True)
    assert code == 0 and store.newest_with("roofgate-baseline", 99) == 2

    save_model(fc(200), repo / "models/b.onnx")  # b: 64 -> 200 outputs, latency up
    git(repo, "commit", "-qam", "grow b")
    for run in (3, 4):  # the regression fails night after night; the baseline stays night 2's
        code, text = night(repo, store, run, bin_dir)
        assert code == 1 and "latency-regression" in text and "1 worse" in text, text
        assert store.newest_with("roofgate-baseline", 99) == 2

    code, text = night(repo, store, 5, bin_dir, refresh=True)  # the deliberate step
    assert code == 1 and store.newest_with("roofgate-baseline", 99) == 5
    code, text = night(repo, store, 6, bin_dir)
    assert code == 0 and "0 worse" in text and store.newest_with("roofgate-baseline", 99) == 6


# --- GitLab: the example's script lines in a GitLab-style clone ----------------------------

@pytest.mark.slow
def test_gitlab_job_script_in_a_single_branch_clone(tmp_path: Path) -> None:
    job = load(ROOT / "docs/examples/roofgate.gitlab-ci.yml")["roofgate"]
    assert job["variables"]["GIT_DEPTH"] == "0"
    assert job["artifacts"]["when"] == "always"
    assert job["artifacts"]["reports"]["junit"] == "roofgate-out/junit.xml"
    assert job["rules"] == [{"if": '$CI_PIPELINE_SOURCE == "merge_request_event"'}]
    origin = make_origin(tmp_path)
    # GitLab clones the merge request's branch only; no origin/main exists in the clone.
    repo = tmp_path / "gl"
    subprocess.run(["git", "clone", "-q", "--single-branch", "--branch", "pr", origin.as_uri(),
                    str(repo)], check=True, capture_output=True, env={**os.environ, **GIT_ENV})
    diff_base = subprocess.run(["git", "merge-base", "main", "pr"], cwd=origin, check=True,
                               capture_output=True, text=True).stdout.strip()
    bin_dir = roofgate_bin(tmp_path / "bin")
    env = {"PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}", "ROOFGATE_OUT": "roofgate-out",
           "CI_MERGE_REQUEST_DIFF_BASE_SHA": diff_base}
    done = run_shell("\n".join(job["script"]), repo, env)
    assert done.returncode == 1, done.stderr  # the job fails: the merge request is blocked
    assert (repo / job["artifacts"]["reports"]["junit"]).is_file()
    assert "params-fit-buffer" in (repo / "roofgate-out/summary.md").read_text()


class _NotesApi(BaseHTTPRequestHandler):
    """A loopback stand-in for GitLab's Notes API (GET /user, GET/POST/PUT notes)."""

    notes: ClassVar[list[dict[str, Any]]] = []
    seen_tokens: ClassVar[list[str]] = []

    def _reply(self, data: Any) -> None:
        body = json.dumps(data).encode()
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def _body(self) -> dict[str, Any]:
        return json.loads(self.rfile.read(int(self.headers["Content-Length"])))

    def do_GET(self) -> None:  # the http.server hook's name
        self.seen_tokens.append(self.headers.get("PRIVATE-TOKEN", ""))
        self._reply({"id": 5} if self.path == "/api/v4/user" else self.notes)

    def do_POST(self) -> None:
        assert self.path == "/api/v4/projects/9/merge_requests/3/notes"
        self.notes.append({"id": len(self.notes) + 100, "author": {"id": 5}, **self._body()})
        self._reply(self.notes[-1])

    def do_PUT(self) -> None:
        note_id = int(self.path.rsplit("/", 1)[1])
        note = next(n for n in self.notes if n["id"] == note_id)
        note.update(self._body())
        self._reply(note)

    def log_message(self, *args: Any) -> None:
        pass


def test_gitlab_note_is_created_once_then_updated(tmp_path: Path) -> None:
    after = load(ROOT / "docs/examples/roofgate.gitlab-ci.yml")["roofgate"]["after_script"][0]
    shim = tmp_path / "shim"
    shim.mkdir()
    (shim / "python").symlink_to(sys.executable)
    (tmp_path / "roofgate-out").mkdir()
    _NotesApi.notes = [{"id": 1, "author": {"id": 77}, "body": "<!-- roofgate-report:v1 -->x"}]
    server = ThreadingHTTPServer(("127.0.0.1", 0), _NotesApi)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    env = {"PATH": f"{shim}{os.pathsep}{os.environ['PATH']}", "ROOFGATE_OUT": "roofgate-out",
           "CI_API_V4_URL": f"http://127.0.0.1:{server.server_port}/api/v4",
           "CI_PROJECT_ID": "9", "CI_MERGE_REQUEST_IID": "3"}
    try:
        (tmp_path / "roofgate-out/summary.md").write_text("first <!-- roofgate-report:v1 -->")
        assert run_shell(after, tmp_path, env).returncode == 0  # no token: no note, no call
        assert _NotesApi.seen_tokens == []
        env["ROOFGATE_NOTE_TOKEN"] = "masked-secret"
        for text in ("first run", "second run"):
            (tmp_path / "roofgate-out/summary.md").write_text(text)
            done = run_shell(after, tmp_path, env)
            assert done.returncode == 0, done.stderr
    finally:
        server.shutdown()
        server.server_close()
        thread.join()
    ours = [n for n in _NotesApi.notes if n["author"]["id"] == 5]
    assert [n["body"] for n in ours] == ["<!-- roofgate-report:v1 -->\nsecond run"]
    assert _NotesApi.notes[0]["body"] == "<!-- roofgate-report:v1 -->x"  # another user's: kept
    assert set(_NotesApi.seen_tokens) == {"masked-secret"}
