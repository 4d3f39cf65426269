"""Pattern matching for policy scopes: model paths, target names, layer names, op types.

Model paths use the repository path globs of ``gate.globs`` (the same the
project config uses for model groups): ``*`` and ``?`` stay inside one folder,
``**`` spans any number of folders. Target names, layer names and op types use
plain case-sensitive shell patterns where ``*`` matches any text, slashes
included (exporters name layers like ``/backbone/conv1/Conv``).
"""

from __future__ import annotations

from fnmatch import fnmatchcase

from gate.globs import normalize_path as normalize_model_path
from gate.globs import path_glob_problem, path_match

__all__ = ["match_any", "match_model", "normalize_model_path", "pattern_problem"]


def match_model(pattern: str, path: str) -> bool:
    """Whether the model ``path`` matches the path glob ``pattern`` (whole path)."""
    return path_match(pattern, path)


def match_any(patterns: tuple[str, ...] | list[str], name: str) -> bool:
    """Whether ``name`` matches any of the shell patterns (case-sensitive)."""
    return any(fnmatchcase(name, p) for p in patterns)


def pattern_problem(pattern: str) -> str:
    """Why a pattern is unusable, or '' when it is fine (checked when a policy loads)."""
    if not pattern.strip():
        return "pattern is empty"
    if pattern.count("[") != pattern.count("]"):
        return f"pattern '{pattern}' has an unbalanced '['"
    return path_glob_problem(pattern)
