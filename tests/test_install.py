"""Installing roofgate: built-in policies by name, and the built wheel working on its own.

The wheel test builds roofgate's wheel (``pip wheel --no-deps``), installs it with
``--no-deps`` into a venv created with ``--system-site-packages`` (so onnx, numpy and
the other dependencies come from this machine and no network is needed) and runs
``.github/scripts/wheel-smoke.sh``, the same script CI's ``wheel`` job and the release
workflow run: ``roofgate demo`` and ``roofgate check -p default`` from outside the
source tree, with the import checked to come from the venv.
"""

from __future__ import annotations

import importlib.util
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from gate.cli import cli
from gate.policy import builtin_policy_names, load_policy
from tests.gitkit import Repo
from tests.loadkit import save, small_cnn

ROOT = Path(__file__).resolve().parent.parent
TARGET = "ws-64x64-4mib"


def rule_ids(json_path: Path) -> set[str]:
    document = json.loads(json_path.read_text())
    return {v["rule_id"] for e in document["result"]["entries"] for v in e["verdicts"]}


def test_the_three_bundled_policies_load_by_name() -> None:
    assert builtin_policy_names() == ["default", "nightly", "strict"]
    for name in builtin_policy_names():
        # the name inside each file matches the name it is called by
        assert load_policy(name).name == name


def test_evaluate_takes_a_built_in_policy_name(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                           ) -> None:
    model = save(small_cnn(), tmp_path / "m.onnx")
    monkeypatch.chdir(tmp_path)  # no file called "default" here: the name is the built-in
    result = CliRunner().invoke(cli, ["evaluate", str(model), "-t", TARGET, "-p", "default",
                                      "--json", "out.json"])
    assert result.exit_code in (0, 1), result.output
    # rule ids of gate/policies/default.yaml, evaluated
    assert {"coverage", "params-fit-buffer", "layer-utilization"} <= rule_ids(tmp_path / "out.json")


def test_a_misspelt_policy_name_lists_the_built_ins(tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    model = save(small_cnn(), tmp_path / "m.onnx")
    monkeypatch.chdir(tmp_path)
    result = CliRunner().invoke(cli, ["evaluate", str(model), "-t", TARGET, "-p", "defualt"])
    assert result.exit_code == 2
    assert "unknown policy 'defualt' (did you mean 'default'?)" in result.stderr
    assert "default, nightly, strict" in result.stderr and "Traceback" not in result.output


def test_a_path_is_still_a_file_and_a_missing_file_says_so(tmp_path: Path,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    model = save(small_cnn(), tmp_path / "m.onnx")
    monkeypatch.chdir(tmp_path)
    result = CliRunner().invoke(cli, ["evaluate", str(model), "-t", TARGET, "-p", "default.yaml"])
    assert result.exit_code == 2 and "default.yaml: file not found" in result.stderr


def test_check_config_names_a_built_in_policy(tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [strict]\n")
    repo.commit("config")
    repo.branch("pr")
    (repo.path / "models").mkdir()
    save(small_cnn(), repo.path / "models/m.onnx")
    repo.commit("add a model")
    monkeypatch.chdir(repo.path)
    result = CliRunner().invoke(cli, ["check", "--base", "main", "--json", "out.json"])
    assert result.exit_code in (0, 1), result.output
    strict = {rule.id for rule in load_policy("strict").rules}
    assert rule_ids(repo.path / "out.json") == strict


def _can_build_offline() -> bool:
    """setuptools >= 70.1 builds wheels itself; older ones need the `wheel` package."""
    return (importlib.util.find_spec("setuptools.command.bdist_wheel") is not None
            or importlib.util.find_spec("wheel") is not None)


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("bash") is None, reason="bash not installed")
def test_the_built_wheel_runs_demo_and_check_from_a_clean_venv(tmp_path: Path) -> None:
    isolation = ["--no-build-isolation"] if _can_build_offline() else []
    build = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", *isolation, "-w",
         str(tmp_path / "dist"), str(ROOT)], capture_output=True, text=True, check=False,
        timeout=300)
    assert build.returncode == 0, build.stderr
    (wheel,) = (tmp_path / "dist").glob("roofgate-*.whl")
    env = {**os.environ, "ROOFGATE_SMOKE_VENV_ARGS": "--system-site-packages",
           "ROOFGATE_SMOKE_PIP_ARGS": "--no-deps --no-index", "PYTHONPATH": "",
           "PYTHON": sys.executable}
    smoke = subprocess.run(["bash", str(ROOT / ".github/scripts/wheel-smoke.sh"), str(wheel)],
                           capture_output=True, text=True, check=False, timeout=600, env=env,
                           cwd=tmp_path)
    assert smoke.returncode == 0, smoke.stdout[-3000:] + smoke.stderr[-3000:]
    assert "wheel smoke test passed" in smoke.stdout
    assert "params-fit-buffer" in smoke.stdout  # the default policy's rule, found by name
