"""A tiny throwaway git repository for check, gitscan and demo tests (never a shell)."""

from __future__ import annotations

import os
import subprocess
from collections.abc import Mapping
from pathlib import Path
from typing import Any

GIT_ENV = {
    "GIT_AUTHOR_NAME": "Roofgate Test", "GIT_AUTHOR_EMAIL": "test@example.invalid",
    "GIT_COMMITTER_NAME": "Roofgate Test", "GIT_COMMITTER_EMAIL": "test@example.invalid",
    "GIT_CONFIG_NOSYSTEM": "1", "GIT_TERMINAL_PROMPT": "0",
}


class Repo:
    """A git work tree in ``path`` with helpers to write, remove, rename and commit files."""

    def __init__(self, path: Path) -> None:
        self.path = path
        path.mkdir(parents=True, exist_ok=True)
        self.git("init", "-q", "-b", "main")

    def git(self, *args: str) -> str:
        env = {**os.environ, **GIT_ENV, "HOME": str(self.path)}
        done = subprocess.run(
            ["git", "-c", "commit.gpgsign=false", "-c", "core.hooksPath=/dev/null", *args],
            cwd=self.path, env=env, capture_output=True, check=True, shell=False)
        return done.stdout.decode("utf-8", "surrogateescape")

    def write(self, rel: str, data: bytes | str) -> None:
        path = self.path / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data.encode() if isinstance(data, str) else data)

    def commit(self, message: str) -> str:
        self.git("add", "-A", "--", ".")
        self.git("commit", "-q", "--allow-empty", "-m", message)
        return self.git("rev-parse", "HEAD").strip()

    def branch(self, name: str) -> None:
        self.git("checkout", "-q", "-b", name)


def repo_with_a_change(path: Path, files: Mapping[str, str], model: str, base: Any,
                       head: Any) -> Repo:
    """A repository whose main branch holds ``files`` (config, policies) and the model
    ``base`` at ``model``, and whose branch pr replaces it by ``head`` (checked out)."""
    from gate.synth.builder import save_model

    repo = Repo(path)
    for rel, text in files.items():
        repo.write(rel, text)
    save_model(base, repo.path / model)
    repo.commit("base")
    repo.branch("pr")
    save_model(head, repo.path / model)
    repo.commit("a change")
    return repo
