"""Docs that run: every YAML block of README.md and docs/ validates, every console command runs.

YAML blocks are sorted by what they hold (a target profile, a policy, a waiver list, a
project config, a GitHub workflow snippet) and read by roofgate's own loaders; a block
that fits none fails the test, so a new kind of block gets a check. Console blocks
(```console) are run through the CLI inside the demo repository that `roofgate demo
--keep` builds (a git repository: `check` needs one, the only commands that do), with
`origin/main` pointing at its main branch, the targets doc's `my-npu.yaml` and a
`last-night.json` snapshot beside it. A command may exit 0 or 1 (the demo branch fails
its gate by design), never 2 or 3. Usage synopses (plain blocks of `roofgate CMD
[--option ...]` lines) must name only options the command has.
"""

from __future__ import annotations

import re
import shlex
import subprocess
from pathlib import Path

import pytest
import yaml
from click.testing import CliRunner

from gate.cli import cli
from gate.config import load_config
from gate.policy import load_policy
from gate.targets.loader import parse_target_bytes

ROOT = Path(__file__).resolve().parent.parent
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
NEEDS_GIT = {"check"}  # commands that read git history (run inside the demo repository)
_FENCE = re.compile(r"^```(\w*)\n(.*?)^```", re.DOTALL | re.MULTILINE)


def _blocks(lang: set[str]) -> list[tuple[str, str]]:
    out = []
    for path in DOCS:
        text = path.read_text(encoding="utf-8")
        for match in _FENCE.finditer(text):
            if match.group(1) in lang:
                line = text[:match.start()].count("\n") + 1
                out.append((f"{path.relative_to(ROOT)}:{line}", match.group(2)))
    return out


def _top_keys(text: str) -> set[str]:
    return {m.group(1) for m in re.finditer(r"^([A-Za-z_]+):", text, re.MULTILINE)}


def yaml_kind(text: str) -> str:
    """What a YAML block holds, from its top-level keys."""
    keys = _top_keys(text)
    if "array" in keys:
        return "target"
    if "rules" in keys:
        return "policy"
    if keys == {"waivers"}:
        return "waivers"
    if keys & {"models", "ungated", "exclude"} or keys >= {"targets", "policies"}:
        return "config"
    if re.search(r"^\s*- (run|uses):", text, re.MULTILINE) or "jobs" in keys:
        return "workflow"
    if keys == {"repos"}:
        return "pre-commit"
    return "unknown"


YAML_BLOCKS = _blocks({"yaml", "yml"})


@pytest.mark.parametrize(("where", "text"), YAML_BLOCKS, ids=[w for w, _ in YAML_BLOCKS])
def test_every_yaml_block_validates(tmp_path: Path, where: str, text: str) -> None:
    kind = yaml_kind(text)
    assert kind != "unknown", f"{where}: a YAML block of no known kind; teach yaml_kind it"
    if kind == "target":
        assert parse_target_bytes(text.encode(), where).name
    elif kind in ("policy", "waivers"):
        if kind == "waivers":  # a fragment: give it the rules its waivers name
            ids = sorted(set(re.findall(r"rule:\s*([\w.-]+)", text)))
            rules = "".join(f"  - {{id: {i}, kind: fits_in_buffer}}\n" for i in ids)
            text = f"version: 1\nname: fragment\nrules:\n{rules}" + text
        (tmp_path / "p.yaml").write_text(text, encoding="utf-8")
        assert load_policy(str(tmp_path / "p.yaml")).rules
    elif kind == "config":
        (tmp_path / "roofgate.yaml").write_text(text, encoding="utf-8")
        assert load_config(tmp_path / "roofgate.yaml", require_targets=False).groups
    else:  # a GitHub workflow or pre-commit snippet: not roofgate's schema; it must parse
        assert yaml.safe_load(text) is not None


def test_the_yaml_blocks_include_the_readme_target_and_policy_examples() -> None:
    """The README's own target example once failed validation when copied."""
    readme = [yaml_kind(text) for where, text in YAML_BLOCKS if where.startswith("README")]
    assert "target" in readme and "policy" in readme


# --- console commands ----------------------------------------------------------------

def console_commands() -> list[tuple[str, list[str]]]:
    """Every `roofgate ...` command of the console blocks: (where, argv after 'roofgate')."""
    out = []
    for where, body in _blocks({"console"}):
        for line in body.splitlines():
            line = line.removeprefix("$ ")
            for part in line.split("&&"):
                part = part.strip()
                if part.startswith("roofgate "):
                    argv = shlex.split(part, comments=True)[1:]
                    out.append((where, argv))
    return out


COMMANDS = console_commands()


@pytest.fixture(scope="module")
def demo_repo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo repository (built by the documented `roofgate demo --keep`), set up for the
    documented commands."""
    folder = tmp_path_factory.mktemp("docs")
    result = CliRunner().invoke(cli, ["demo", "--keep", str(folder)])
    assert result.exit_code == 0, result.output
    repo = next(p.parent for p in folder.rglob("roofgate.yaml"))
    subprocess.run(["git", "update-ref", "refs/remotes/origin/main", "main"], cwd=repo,
                   check=True, capture_output=True)
    (target,) = [text for _, text in YAML_BLOCKS if yaml_kind(text) == "target"
                 and "docs/targets.md" in _where_of(text)]
    (repo / "my-npu.yaml").write_text(target, encoding="utf-8")
    return repo


def _where_of(text: str) -> str:
    return next(where for where, body in YAML_BLOCKS if body == text)


@pytest.mark.parametrize(("where", "argv"), COMMANDS,
                         ids=[f"{w} roofgate {' '.join(a)}" for w, a in COMMANDS])
def test_every_console_command_runs(demo_repo: Path, monkeypatch: pytest.MonkeyPatch,
                                    where: str, argv: list[str]) -> None:
    if argv[:1] == ["demo"]:
        return  # the demo_repo fixture ran `roofgate demo --keep` already
    if any(arg.startswith("[") for arg in argv):  # a synopsis: its options must exist
        help_text = CliRunner().invoke(cli, [argv[0], "--help"]).output
        missing = [a.strip("[]") for a in argv if a.strip("[]").startswith("--")
                   and a.strip("[]") not in help_text]
        assert not missing, f"{where}: roofgate {argv[0]} has no {missing}"
        return
    monkeypatch.chdir(demo_repo)
    if "--baseline" in argv:  # the snapshot a previous night would have written
        snapshot = argv[argv.index("--baseline") + 1]
        made = CliRunner().invoke(cli, ["audit", "--snapshot", snapshot])
        assert made.exit_code in (0, 1), made.output
    result = CliRunner().invoke(cli, argv)
    assert result.exit_code in (0, 1), (where, argv, result.output)
    assert "Traceback" not in result.output and "internal error" not in result.output
    if argv[0] in NEEDS_GIT:
        assert (demo_repo / ".git").exists()


def test_console_blocks_hold_commands() -> None:
    assert {argv[0] for _, argv in COMMANDS} >= {"check", "audit", "targets", "demo"}


# --- usage synopses ---------------------------------------------------------------------

def synopses() -> list[tuple[str, str, list[str]]]:
    """(where, command, options) of each `roofgate CMD [...]` synopsis in a plain block."""
    out = []
    for where, body in _blocks({""}):
        command, options = "", []
        for line in body.splitlines():
            match = re.match(r"roofgate (\w+)", line)
            if match:
                if command:
                    out.append((where, command, options))
                command, options = match.group(1), []
            if command:
                options += re.findall(r"(?<![\w-])(--[a-z][a-z-]*)", line)
        if command:
            out.append((where, command, options))
    return out


SYNOPSES = synopses()


@pytest.mark.parametrize(("where", "command", "options"), SYNOPSES,
                         ids=[f"{w} {c}" for w, c, _ in SYNOPSES])
def test_every_synopsis_names_real_options(where: str, command: str,
                                           options: list[str]) -> None:
    help_text = CliRunner().invoke(cli, [command, "--help"]).output
    missing = [o for o in options if o not in help_text]
    assert not missing, f"{where}: roofgate {command} has no {missing}"
