"""The GitHub workflows: valid YAML, least privilege, pinned actions, and the steps docs/ci.md promises.

Rules checked come from GitHub's documentation: "Security hardening for GitHub
Actions" (pin actions to a full-length commit SHA; least-privilege
``permissions``), "Events that trigger workflows" (``workflow_run`` runs with
the default branch's workflow and may write; ``pull_request`` from forks gets a
read-only token), and "Workflow commands" (job summary limit 1 MiB per step).
Shell bodies are checked with ``bash -n`` (the runner's default shell is bash).
"""

from __future__ import annotations

import re
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml

import gate
from gate.cli import cli

ROOT = Path(__file__).resolve().parent.parent
WORKFLOWS = sorted((ROOT / ".github" / "workflows").glob("*.yml")) + sorted(
    (ROOT / ".github" / "examples").glob("*.yml"))
PINNED = re.compile(r"^[\w.-]+/[\w./-]+@[0-9a-f]{40}$")


def load(name: str) -> dict[str, Any]:
    path = next(p for p in WORKFLOWS if p.name == name)
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["on"] = data.pop(True, data.get("on"))  # YAML 1.1 reads the key `on` as true
    return data


def steps(workflow: dict[str, Any]) -> Iterator[tuple[str, dict[str, Any]]]:
    for job_id, job in workflow["jobs"].items():
        for step in job.get("steps", []):
            yield job_id, step


def runs(workflow: dict[str, Any]) -> str:
    return "\n".join(s.get("run", "") for _, s in steps(workflow))


def test_expected_files_exist() -> None:
    names = {p.name for p in WORKFLOWS}
    assert {"ci.yml", "roofgate-pr.yml", "roofgate-pr-comment.yml",
            "roofgate-nightly.yml"} <= names


@pytest.mark.parametrize("path", WORKFLOWS, ids=lambda p: p.name)
def test_least_privilege_and_pinned_actions(path: Path) -> None:
    workflow = load(path.name)
    assert workflow["permissions"] == {}, "top level grants nothing"
    assert "pull_request_target" not in (workflow["on"] or {})
    for job_id, job in workflow["jobs"].items():
        assert "permissions" in job, f"job {job_id} must declare its permissions"
        assert "write-all" not in str(job["permissions"])
        assert job.get("timeout-minutes"), f"job {job_id} needs a timeout"
    for job_id, step in steps(workflow):
        if "uses" in step:
            assert PINNED.match(step["uses"]), f"{job_id}: {step['uses']} not pinned to a SHA"
        if str(step.get("uses", "")).startswith("actions/checkout@"):
            assert step["with"]["persist-credentials"] is False


@pytest.mark.skipif(shutil.which("bash") is None, reason="bash not installed")
@pytest.mark.parametrize("path", WORKFLOWS, ids=lambda p: p.name)
def test_shell_steps_parse(path: Path) -> None:
    for job_id, step in steps(load(path.name)):
        if "run" in step:
            done = subprocess.run(["bash", "-n"], input=step["run"].encode(), capture_output=True,
                                  shell=False, check=False)
            assert done.returncode == 0, f"{job_id}: {done.stderr.decode()}"
        for value in step.get("with", {}).values():
            # no untrusted event text interpolated into scripts (script injection)
            assert "github.event.pull_request.title" not in str(value)
        assert "${{" not in step.get("run", ""), f"{job_id}: pass expressions via env, not inline"


def test_project_ci_tests_every_supported_python() -> None:
    workflow = load("ci.yml")
    versions = workflow["jobs"]["test"]["strategy"]["matrix"]["python-version"]
    assert versions[0] == "3.10"  # pyproject: requires-python >= 3.10
    assert "requires-python = \">=3.10\"" in (ROOT / "pyproject.toml").read_text()
    assert "python -m pytest" in runs(workflow) and "roofgate demo" in runs(workflow)


def test_project_ci_lints_with_pinned_tools_and_never_cancels_main() -> None:
    workflow = load("ci.yml")
    text = runs(workflow)
    assert "ruff check gate tests bench" in text and "mypy gate" in text
    assert 'pip install -e ".[lint]"' in text
    # tomllib is Python >= 3.11 and roofgate supports 3.10: read the extra's lines directly.
    pyproject = (ROOT / "pyproject.toml").read_text()
    lint_extra = re.findall(r'^    "([^"]+)",$', pyproject.split("\nlint = [", 1)[1].split("]")[0],
                            re.MULTILINE)
    assert {r.split("==")[0] for r in lint_extra} == {"ruff", "mypy"}
    assert all(re.fullmatch(r"[a-z]+==[0-9.]+", r) for r in lint_extra), "exact pins"
    # Superseded runs are cancelled on pull requests only: the expression is false on push.
    concurrency = workflow["concurrency"]
    assert concurrency["cancel-in-progress"] == "${{ github.event_name == 'pull_request' }}"
    assert "github.sha" in concurrency["group"]  # each push to main is its own group
    assert "wheel-smoke.sh" in text


def test_pull_request_workflow() -> None:
    workflow = load("roofgate-pr.yml")
    assert list(workflow["on"]) == ["pull_request"]
    job = workflow["jobs"]["check"]
    assert job["permissions"] == {"contents": "read"}
    checkout = next(s for _, s in steps(workflow) if "checkout" in s.get("uses", ""))
    assert checkout["with"]["fetch-depth"] == 0 and checkout["with"]["lfs"] is True
    text = runs(workflow)
    assert 'roofgate check --base "origin/${BASE_REF}"' in text
    assert "--annotations -" in text and "--junit" in text and "--markdown" in text
    assert "GITHUB_STEP_SUMMARY" in text and "limit=1000000" in text
    upload = next(s for _, s in steps(workflow) if "upload-artifact" in s.get("uses", ""))
    assert "junit.xml" in upload["with"]["path"] and "summary.md" in upload["with"]["path"]
    assert upload["if"] == "always()"
    assert f'ROOFGATE_VERSION: "{gate.__version__}"' in (
        ROOT / ".github/examples/roofgate-pr.yml").read_text()


def test_comment_workflow_treats_the_artifact_as_data() -> None:
    workflow = load("roofgate-pr-comment.yml")
    assert workflow["on"]["workflow_run"]["workflows"] == [load("roofgate-pr.yml")["name"]]
    job = workflow["jobs"]["comment"]
    assert job["permissions"] == {"actions": "read", "pull-requests": "write"}
    uses = [s.get("uses", "") for _, s in steps(workflow)]
    assert not any("checkout" in u for u in uses), "never check out fork code with a write token"
    assert not any("run" in s for _, s in steps(workflow)), "no shell touches the artifact"
    script = next(s for _, s in steps(workflow) if "github-script" in s.get("uses", ""))
    code = script["with"]["script"]
    assert "pr.head.sha !== run.head_sha" in code  # the PR number is verified, not trusted
    assert "MARKER" in code and "github-actions[bot]" in code and "updateComment" in code
    assert "MAX_CHARS" in code and "\\u200b" in code


def test_nightly_workflow_shards_and_merges() -> None:
    workflow = load("roofgate-nightly.yml")
    assert "schedule" in workflow["on"]
    audit_job, merge_job = workflow["jobs"]["audit"], workflow["jobs"]["merge"]
    assert audit_job["strategy"]["matrix"]["shard"] == [1, 2, 3, 4]
    assert audit_job["strategy"]["fail-fast"] is False
    text = runs(workflow)
    assert '--shard "${SHARD}/${SHARDS}"' in text and "roofgate merge shards/shard-*.json" in text
    upload = next(s for j, s in steps(workflow) if j == "audit" and "upload-artifact" in
                  s.get("uses", ""))
    assert upload["with"]["name"] == "roofgate-shard-${{ matrix.shard }}"
    download = next(s for _, s in steps(workflow) if "download-artifact" in s.get("uses", ""))
    assert download["with"]["pattern"] == "roofgate-shard-*"
    assert download["with"]["merge-multiple"] is True
    assert merge_job["needs"] == "audit" and "cancelled" in merge_job["if"]
    assert "--baseline" in text and "--snapshot" in text


@pytest.mark.parametrize("command,options", [
    ("check", ["--base", "--junit", "--markdown", "--json", "--annotations"]),
    ("audit", ["--shard", "--shard-out", "--baseline", "-j"]),
    ("merge", ["--junit", "--markdown", "--json", "--snapshot"]),
])
def test_options_the_workflows_use_exist(command: str, options: list[str]) -> None:
    params = {opt for p in cli.commands[command].params for opt in getattr(p, "opts", [])}
    assert set(options) <= params
