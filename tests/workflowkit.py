"""Helpers to test the CI files as a user runs them: load, validate, and run their steps locally.

``load`` reads a workflow (YAML 1.1 reads the key ``on`` as true; GitHub means "on").
``schema`` returns a schema that check-jsonschema vendors (GitHub workflow and action
schemas, GitLab CI schema), so validation needs no network. ``run_shell`` runs a
``run:`` block the way a GitHub runner does (``bash --noprofile --norc -eo pipefail``).
``run_github_script`` runs an ``actions/github-script`` script in node with a
recording stand-in for the API client. ``roofgate_bin`` puts a ``roofgate`` command
that runs this checkout's code on PATH.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections.abc import Iterator, Mapping
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

ROOT = Path(__file__).resolve().parent.parent
NODE = shutil.which("node")

_NODE_HARNESS = r"""
const fs = require('fs');
const [scriptFile, scenarioFile] = process.argv.slice(2);
const script = fs.readFileSync(scriptFile, 'utf8');
const s = JSON.parse(fs.readFileSync(scenarioFile, 'utf8'));
const calls = [], outputs = {}, log = {notices: [], warnings: [], infos: [], failed: null};
const core = {
  setOutput: (k, v) => { outputs[k] = String(v); }, setFailed: m => { log.failed = m; },
  notice: m => log.notices.push(m), warning: m => log.warnings.push(m), info: m => log.infos.push(m),
};
const record = (name, result) => async a => { calls.push([name, a]); return {data: result(a)}; };
const github = {
  rest: {
    pulls: {get: record('pulls.get', () => ({head: {sha: s.pr_head_sha}}))},
    issues: {listComments: 'issues.listComments',
             updateComment: record('issues.updateComment', () => ({})),
             createComment: record('issues.createComment', () => ({}))},
    actions: {
      getWorkflowRun: record('actions.getWorkflowRun', () => ({workflow_id: 7, head_branch: 'main'})),
      listWorkflowRuns: record('actions.listWorkflowRuns', () => ({workflow_runs: s.runs || []})),
      listWorkflowRunArtifacts: record('actions.listWorkflowRunArtifacts',
                                       a => ({artifacts: (s.artifacts || {})[String(a.run_id)] || []})),
    },
  },
  paginate: async (fn, a) => { calls.push(['paginate ' + fn, a]); return s.comments || []; },
};
const context = {payload: {workflow_run: s.workflow_run}, repo: {owner: 'o', repo: 'r'},
                 runId: s.run_id};
const AsyncFunction = Object.getPrototypeOf(async function () {}).constructor;
new AsyncFunction('require', 'github', 'context', 'core', script)(require, github, context, core)
  .then(() => process.stdout.write(JSON.stringify({outputs, log, calls})))
  .catch(e => { console.error(e); process.exit(1); });
"""


def load(path: Path) -> dict[str, Any]:
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    if True in data:
        data["on"] = data.pop(True)
    return data


def schema(name: str) -> dict[str, Any]:
    """A schema vendored by check-jsonschema (``github-workflows``, ``github-actions``, ``gitlab-ci``)."""
    vendor = resources.files("check_jsonschema.builtin_schemas.vendor")
    return json.loads(vendor.joinpath(f"{name}.json").read_text(encoding="utf-8"))


def steps(workflow: Mapping[str, Any]) -> Iterator[tuple[str, dict[str, Any]]]:
    for job_id, job in workflow["jobs"].items():
        for step in job.get("steps", []):
            yield job_id, step


def step_named(workflow: Mapping[str, Any], job: str, prefix: str) -> dict[str, Any]:
    return next(s for s in workflow["jobs"][job]["steps"] if s.get("name", "").startswith(prefix))


def run_shell(script: str, cwd: Path, env: Mapping[str, str]) -> subprocess.CompletedProcess[str]:
    """Run a ``run:`` block as a GitHub runner does (bash -eo pipefail), capturing its output."""
    return subprocess.run(["bash", "--noprofile", "--norc", "-eo", "pipefail", "-c", script],
                          cwd=cwd, env={**os.environ, **env}, capture_output=True, text=True,
                          check=False, timeout=300)


def roofgate_bin(folder: Path) -> Path:
    """A ``roofgate`` executable in ``folder`` that runs this checkout's gate package."""
    folder.mkdir(parents=True, exist_ok=True)
    exe = folder / "roofgate"
    exe.write_text(f"#!/bin/sh\nPYTHONPATH={str(ROOT)!r} exec {sys.executable!r} -c "
                   "'import sys; sys.argv[0] = \"roofgate\"; from gate.cli import main; main()' "
                   '"$@"\n')
    exe.chmod(0o755)
    return folder


def run_github_script(script: str, scenario: Mapping[str, Any], tmp: Path,
                      env: Mapping[str, str] | None = None) -> dict[str, Any]:
    """Run an actions/github-script ``script`` in node against a recording API stand-in."""
    assert NODE is not None
    (tmp / "harness.js").write_text(_NODE_HARNESS)
    (tmp / "script.js").write_text(script)
    (tmp / "scenario.json").write_text(json.dumps(scenario))
    done = subprocess.run([NODE, str(tmp / "harness.js"), str(tmp / "script.js"),
                           str(tmp / "scenario.json")], capture_output=True, text=True,
                          check=False, timeout=60, env={**os.environ, **(env or {})})
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def github_env(tmp: Path) -> dict[str, str]:
    """The files a runner provides to steps (outputs, summary, PATH additions)."""
    files = {"GITHUB_OUTPUT": tmp / "output", "GITHUB_STEP_SUMMARY": tmp / "summary",
             "GITHUB_PATH": tmp / "path"}
    for path in files.values():
        path.write_text("")
    return {key: str(path) for key, path in files.items()} | {"RUNNER_TEMP": str(tmp)}


def outputs(env: Mapping[str, str]) -> dict[str, str]:
    """The ``key=value`` lines a step appended to GITHUB_OUTPUT (last one wins)."""
    lines = Path(env["GITHUB_OUTPUT"]).read_text().splitlines()
    return dict(line.split("=", 1) for line in lines if "=" in line)
