"""The CI files: schema-valid, least privilege, pinned actions, and the promises docs/ci.md makes.

Sources: GitHub's documentation ("Security hardening for GitHub Actions": pin actions to
a full-length commit SHA, least-privilege ``permissions``; "Events that trigger
workflows": ``workflow_run`` runs the default branch's file with a token that may write,
``pull_request`` from forks gets a read-only token, ``merge_group`` for merge queues;
"Workflow commands": the job summary limit of 1 MiB per step); the GitHub workflow and
action schemas and the GitLab CI schema as vendored by check-jsonschema. The comment and
baseline scripts run in node against a recording stand-in for the API client. Step-by-step
simulations of the shell steps are in tests/test_workflow_runs.py.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import click
import jsonschema
import pytest

from gate.cli import cli
from tests.workflowkit import (
    NODE,
    ROOT,
    load,
    run_github_script,
    schema,
    step_named,
    steps,
)

WORKFLOWS = sorted((ROOT / ".github" / "workflows").glob("*.yml"))
EXAMPLES = sorted((ROOT / ".github" / "examples").glob("*.yml"))
ACTION = ROOT / "action.yml"
GITLAB = ROOT / "docs" / "examples" / "roofgate.gitlab-ci.yml"
SCRIPTS = sorted((ROOT / ".github" / "scripts").glob("*.sh"))

# Every action the files use, at its current node24 release. Each SHA was matched to its
# release tag in public records of the actions' repositories on 2026-12-02 (several
# independent workflow files and release notes quoting the same SHA and tag).
VERIFIED_PINS = {
    "actions/checkout": ("3d3c42e5aac5ba805825da76410c181273ba90b1", "v7.0.1"),
    "actions/setup-python": ("5fda3b95a4ea91299a34e894583c3862153e4b97", "v7.0.0"),
    "actions/upload-artifact": ("043fb46d1a93c77aae656e7c1c64a875d1fc6a0a", "v7.0.1"),
    "actions/download-artifact": ("3e5f45b2cfb9172054b4087a40e8e0b5a5461e7c", "v8.0.1"),
    "actions/github-script": ("3a2844b7e9c422d3c10d287c895573f7108da1b3", "v9.0.0"),
}
ROOFGATE_PLACEHOLDER = "your-org/roofgate@" + "0" * 40
USES_LINE = re.compile(r"^\s*(?:-\s+)?uses:\s*(\S+)(.*)$", re.MULTILINE)
needs_node = pytest.mark.skipif(NODE is None, reason="node is not installed")


def by_name(name: str) -> dict[str, Any]:
    return load(next(p for p in [*WORKFLOWS, *EXAMPLES] if p.name == name))


def test_expected_files_exist() -> None:
    names = {p.name for p in [*WORKFLOWS, *EXAMPLES]}
    assert {"ci.yml", "release.yml", "roofgate-pr.yml", "roofgate-pr-comment.yml",
            "roofgate-nightly.yml"} <= names
    assert ACTION.is_file() and GITLAB.is_file() and (ROOT / ".pre-commit-hooks.yaml").is_file()


@pytest.mark.parametrize("path", [*WORKFLOWS, *EXAMPLES], ids=lambda p: p.name)
def test_workflows_match_the_github_workflow_schema(path: Path) -> None:
    checker = jsonschema.Draft7Validator(schema("github-workflows"))
    problems = [f"{'/'.join(map(str, e.path))}: {e.message}" for e in
                checker.iter_errors(load(path))]
    assert problems == []


def test_action_and_gitlab_example_match_their_schemas() -> None:
    for file, name in ((ACTION, "github-actions"), (GITLAB, "gitlab-ci")):
        checker = jsonschema.Draft7Validator(schema(name))
        assert [e.message for e in checker.iter_errors(load(file))] == [], file.name


@pytest.mark.parametrize("path", [*WORKFLOWS, *EXAMPLES, ACTION], ids=lambda p: p.name)
def test_every_action_is_a_verified_node24_release_pinned_by_sha(path: Path) -> None:
    for ref, comment in USES_LINE.findall(path.read_text(encoding="utf-8")):
        if ref == ROOFGATE_PLACEHOLDER:  # the adopter's pin of roofgate itself
            assert path in EXAMPLES and "PIN" in comment
            continue
        name, _, sha = ref.partition("@")
        name = name.split("/", 2)[0] + "/" + name.split("/", 2)[1]  # actions/cache/save -> owner/repo
        assert name in VERIFIED_PINS, f"{path.name}: {ref} is not a verified action"
        assert (sha, comment.strip()) == (VERIFIED_PINS[name][0], f"# {VERIFIED_PINS[name][1]}")


@pytest.mark.parametrize("path", [*WORKFLOWS, *EXAMPLES], ids=lambda p: p.name)
def test_least_privilege(path: Path) -> None:
    workflow = load(path)
    assert workflow["permissions"] == {}, "top level grants nothing"
    assert "pull_request_target" not in (workflow["on"] or {})
    for job_id, job in workflow["jobs"].items():
        assert "permissions" in job, f"job {job_id} must declare its permissions"
        assert "write-all" not in str(job["permissions"])
        assert job.get("timeout-minutes"), f"job {job_id} needs a timeout"
    for _, step in steps(workflow):
        if str(step.get("uses", "")).startswith("actions/checkout@"):
            assert step["with"]["persist-credentials"] is False


def run_blocks() -> list[tuple[str, str]]:
    blocks = [(f"{p.name}:{j}", s["run"]) for p in [*WORKFLOWS, *EXAMPLES]
              for j, s in steps(load(p)) if "run" in s]
    blocks += [(f"action.yml:{s['name']}", s["run"]) for s in load(ACTION)["runs"]["steps"]]
    return blocks + [(p.name, p.read_text()) for p in SCRIPTS]


@pytest.mark.skipif(shutil.which("bash") is None, reason="bash not installed")
@pytest.mark.parametrize("where,script", run_blocks(), ids=lambda v: str(v)[:40])
def test_shell_parses_and_takes_no_inline_expressions(where: str, script: str) -> None:
    done = subprocess.run(["bash", "-n"], input=script.encode(), capture_output=True,
                          shell=False, check=False)
    assert done.returncode == 0, f"{where}: {done.stderr.decode()}"
    # No `${{ }}` inside scripts: inputs and event text reach shells through env only.
    assert "${{" not in script, f"{where}: pass expressions via env"


def test_project_ci_tests_every_supported_python() -> None:
    workflow = by_name("ci.yml")
    versions = workflow["jobs"]["test"]["strategy"]["matrix"]["python-version"]
    assert versions[0] == "3.10"  # pyproject: requires-python >= 3.10
    assert "requires-python = \">=3.10\"" in (ROOT / "pyproject.toml").read_text()
    text = "\n".join(s.get("run", "") for _, s in steps(workflow))
    assert "python -m pytest" in text and "roofgate demo" in text


def test_project_ci_lints_with_pinned_tools_and_never_cancels_main() -> None:
    workflow = by_name("ci.yml")
    text = "\n".join(s.get("run", "") for _, s in steps(workflow))
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


def test_release_builds_checks_and_publishes_only_tags() -> None:
    workflow = by_name("release.yml")
    assert workflow["on"]["push"]["tags"] == ["v*"]
    build, publish = workflow["jobs"]["build"], workflow["jobs"]["publish"]
    assert build["permissions"] == {"contents": "read"}
    assert publish["permissions"] == {"contents": "write"} and publish["needs"] == "build"
    assert publish["if"] == "startsWith(github.ref, 'refs/tags/v')"
    text = "\n".join(s.get("run", "") for _, s in steps(workflow))
    assert "python -m build" in text and "wheel-smoke.sh" in text and "--verify-tag" in text


def test_action_inputs_outputs_and_steps() -> None:
    action = load(ACTION)
    assert action["runs"]["using"] == "composite"
    assert {"base", "config", "policy", "report-dir", "job-summary", "annotations"} <= set(
        action["inputs"])
    assert {"exit-code", "report-dir", "junit", "markdown", "json"} <= set(action["outputs"])
    for step in action["runs"]["steps"]:
        assert step["shell"] == "bash"
        script = re.search(r'\.github/scripts/([\w-]+\.sh)', step["run"])
        assert script is None or (ROOT / ".github/scripts" / script.group(1)).is_file()
    install = action["runs"]["steps"][0]
    assert "action-install.sh" in install["run"]  # from the action's own files, no index
    assert "pip install" in (ROOT / ".github/scripts/action-install.sh").read_text()


def test_pull_request_workflow_uses_the_action_and_reports_in_merge_queues() -> None:
    workflow = by_name("roofgate-pr.yml")
    assert set(workflow["on"]) == {"pull_request", "merge_group"}
    job = workflow["jobs"]["check"]
    assert job["permissions"] == {"contents": "read"} and job["name"] == "roofgate check"
    checkout = next(s for _, s in steps(workflow) if "checkout" in s.get("uses", ""))
    assert checkout["with"]["fetch-depth"] == 0 and checkout["with"]["lfs"] is True
    gate = next(s for _, s in steps(workflow) if s.get("uses") == ROOFGATE_PLACEHOLDER)
    upload = next(s for _, s in steps(workflow) if "upload-artifact" in s.get("uses", ""))
    assert upload["if"] == "always()"
    assert f"steps.{gate['id']}.outputs.report-dir" in upload["with"]["path"]  # not hard-coded
    assert "pip install \"roofgate" not in (ROOT / ".github/examples/roofgate-pr.yml").read_text()


def test_comment_workflow_is_split_so_the_writer_never_touches_the_artifact() -> None:
    workflow = by_name("roofgate-pr-comment.yml")
    assert workflow["on"]["workflow_run"]["workflows"] == [by_name("roofgate-pr.yml")["name"]]
    prepare, post = workflow["jobs"]["prepare"], workflow["jobs"]["post"]
    assert prepare["permissions"] == {"actions": "read", "pull-requests": "read"}
    assert post["permissions"] == {"pull-requests": "write"} and post["needs"] == "prepare"
    uses = [s.get("uses", "") for _, s in steps(workflow)]
    assert not any("checkout" in u for u in uses), "never check out fork code"
    assert not any("run" in s for _, s in steps(workflow)), "no shell touches the artifact"
    assert not any("artifact" in s.get("uses", "") for s in post["steps"])
    assert "github.event.workflow_run" not in str(post["steps"][0]["env"])  # outputs only
    assert set(prepare["outputs"]) == {"pr-number", "body"}
    assert "head_branch" in workflow["concurrency"]["group"]
    assert workflow["concurrency"]["cancel-in-progress"] is False


def test_nightly_workflow_shards_merges_and_keeps_its_baseline_in_artifacts() -> None:
    workflow = by_name("roofgate-nightly.yml")
    assert "schedule" in workflow["on"]
    assert set(workflow["on"]["workflow_dispatch"]["inputs"]) == {"first-run", "refresh-baseline"}
    audit_job, merge_job = workflow["jobs"]["audit"], workflow["jobs"]["merge"]
    assert audit_job["strategy"]["matrix"]["shard"] == [1, 2, 3, 4]
    assert audit_job["strategy"]["fail-fast"] is False
    assert merge_job["needs"] == ["baseline", "audit"] and "cancelled" in merge_job["if"]
    uses = " ".join(s.get("uses", "") for _, s in steps(workflow))
    assert "actions/cache" not in uses  # the baseline lives in artifacts, never in the cache
    store = step_named(workflow, "merge", "Store tonight")
    assert store["with"]["name"] == "roofgate-baseline" and store["with"]["retention-days"] >= 30
    download = step_named(workflow, "audit", "Download the baseline")
    assert download["with"]["run-id"] == "${{ needs.baseline.outputs.run-id }}"


@pytest.mark.parametrize("command,options", [
    ("check", ["--base", "--junit", "--markdown", "--json", "--annotations", "--policy",
               "--target", "--config"]),
    ("audit", ["--shard", "--shard-out", "--baseline", "-j"]),
    ("merge", ["--junit", "--markdown", "--json", "--snapshot"]),
])
def test_options_the_workflows_use_exist(command: str, options: list[str]) -> None:
    found = cli.get_command(click.Context(cli), command)  # commands load lazily
    assert found is not None, command
    params = {opt for p in found.params for opt in getattr(p, "opts", [])}
    assert set(options) <= params


# --- the scripts of actions/github-script, run in node ------------------------------------

MARKER = "<!-- roofgate-report:v1 -->"
TESTED = "a" * 40


def comment_scripts() -> tuple[str, str]:
    workflow = by_name("roofgate-pr-comment.yml")
    return (workflow["jobs"]["prepare"]["steps"][1]["with"]["script"],
            workflow["jobs"]["post"]["steps"][0]["with"]["script"])


def prepare(tmp_path: Path, files: dict[str, str], pr_head: str = TESTED) -> dict[str, Any]:
    report = tmp_path / "untrusted"
    report.mkdir(exist_ok=True)
    for name, text in files.items():
        (report / name).write_text(text)
    scenario = {"pr_head_sha": pr_head,
                "workflow_run": {"head_sha": TESTED, "html_url": "https://example.invalid/r/1"}}
    return run_github_script(comment_scripts()[0], scenario, tmp_path,
                             env={"REPORT_DIR": str(report)})


@needs_node
def test_prepare_validates_the_number_and_caps_the_body(tmp_path: Path) -> None:
    hostile = f"{MARKER}\n@everyone look\n" + "x" * 70 + "\n"
    done = prepare(tmp_path, {"pr-number.txt": "42\n", "summary.md": hostile * 1500})
    body = done["outputs"]["body"]
    assert done["outputs"]["pr-number"] == "42" and done["log"]["failed"] is None
    assert body.startswith(MARKER) and body.count(MARKER) == 1  # the untrusted marker removed
    assert "@everyone" not in body and "@\u200beveryone" in body
    assert len(body) < 65536 and "cut at the comment size limit" in body
    assert done["calls"][0] == ["pulls.get", {"owner": "o", "repo": "r", "pull_number": 42}]


@needs_node
@pytest.mark.parametrize("number", ["42; rm -rf /", "-1", "", "12345678901", "4 2"])
def test_prepare_refuses_a_number_that_is_not_digits(tmp_path: Path, number: str) -> None:
    done = prepare(tmp_path, {"pr-number.txt": number, "summary.md": "ok"})
    assert done["log"]["failed"] == "no valid PR number in the artifact"
    assert done["outputs"] == {} and done["calls"] == []


@needs_node
def test_prepare_of_a_stale_run_hands_nothing_on_quietly(tmp_path: Path) -> None:
    done = prepare(tmp_path, {"pr-number.txt": "7", "summary.md": "ok"}, pr_head="b" * 40)
    assert done["outputs"] == {} and done["log"]["failed"] is None
    assert "moved on" in done["log"]["notices"][0]


@needs_node
def test_prepare_ignores_a_symlink_planted_in_the_artifact(tmp_path: Path) -> None:
    secret = tmp_path / "secret.txt"
    secret.write_text("TOKEN-VALUE")
    report = tmp_path / "untrusted"
    report.mkdir()
    (report / "summary.md").symlink_to(secret)
    (report / "pr-number.txt").write_text("5")
    done = prepare(tmp_path, {})
    assert "TOKEN-VALUE" not in done["outputs"]["body"]


def post(tmp_path: Path, comments: list[dict[str, Any]], pr_head: str = TESTED,
         number: str = "42", body: str = MARKER + "\nreport") -> dict[str, Any]:
    scenario = {"pr_head_sha": pr_head, "comments": comments,
                "workflow_run": {"head_sha": TESTED}}
    return run_github_script(comment_scripts()[1], scenario, tmp_path,
                             env={"PR_NUMBER": number, "BODY": body})


@needs_node
@pytest.mark.parametrize("comments,expected", [
    ([], "issues.createComment"),
    ([{"id": 9, "user": {"login": "someone"}, "body": MARKER + " copied"}], "issues.createComment"),
    ([{"id": 3, "user": {"login": "github-actions[bot]"}, "body": "unrelated"},
      {"id": 4, "user": {"login": "github-actions[bot]"}, "body": MARKER + "\nold"}],
     "issues.updateComment"),
])
def test_post_creates_or_updates_one_comment(tmp_path: Path, comments: list[dict[str, Any]],
                                             expected: str) -> None:
    done = post(tmp_path, comments)
    writes = [c for c in done["calls"] if c[0].startswith("issues.")]
    assert [w[0] for w in writes] == [expected]
    if expected == "issues.updateComment":
        assert writes[0][1]["comment_id"] == 4


@needs_node
def test_post_of_a_stale_run_writes_nothing(tmp_path: Path) -> None:
    done = post(tmp_path, [], pr_head="c" * 40)
    assert not [c for c in done["calls"] if c[0].startswith("issues.")]
    assert done["log"]["failed"] is None and "moved on" in done["log"]["notices"][0]


@needs_node
def test_post_refuses_outputs_it_did_not_expect(tmp_path: Path) -> None:
    done = post(tmp_path, [], number="1 OR 1", body="no marker")
    assert done["log"]["failed"] and not done["calls"]


def finder_script() -> str:
    return step_named(by_name("roofgate-nightly.yml"), "baseline", "Newest")["with"]["script"]


@needs_node
def test_baseline_finder_takes_the_newest_earlier_run_with_a_live_baseline(tmp_path: Path,
                                                                           ) -> None:
    runs = [{"id": 50, "created_at": "tonight"}, {"id": 49, "created_at": "last night"},
            {"id": 48, "created_at": "two nights ago"}, {"id": 47, "created_at": "three"}]
    artifacts = {"49": [], "48": [{"name": "roofgate-baseline", "expired": True}],
                 "47": [{"name": "roofgate-baseline", "expired": False}]}
    done = run_github_script(finder_script(), {"run_id": 50, "runs": runs,
                                               "artifacts": artifacts}, tmp_path)
    assert done["outputs"] == {"run-id": "47"}
    listed = next(c for c in done["calls"] if c[0] == "actions.listWorkflowRuns")[1]
    assert listed["workflow_id"] == 7 and listed["status"] == "completed"


@needs_node
def test_baseline_finder_warns_when_there_is_none(tmp_path: Path) -> None:
    done = run_github_script(finder_script(), {"run_id": 3, "runs": [{"id": 3}],
                                               "artifacts": {}}, tmp_path)
    assert done["outputs"] == {} and "no earlier run" in done["log"]["warnings"][0]
