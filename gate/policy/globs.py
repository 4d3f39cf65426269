"""Pattern matching for policy scopes: model paths, target names, layer names, op types.

Model paths use path globs matched against the whole repository-relative path:
``*`` and ``?`` stay inside one folder, ``**`` spans any number of folders
(including none), ``[abc]`` is a character class. Target names, layer names
and op types use plain case-sensitive shell patterns where ``*`` matches any
text, slashes included (exporters name layers like ``/backbone/conv1/Conv``).
"""

from __future__ import annotations

import re
from fnmatch import fnmatchcase
from functools import lru_cache


def normalize_model_path(path: str) -> str:
    """Forward slashes and no leading './', so 'models\\\\a.onnx' and './models/a.onnx' match."""
    text = path.replace("\\", "/")
    while text.startswith("./"):
        text = text[2:]
    return text


@lru_cache(maxsize=512)
def _path_regex(pattern: str) -> re.Pattern[str]:
    out: list[str] = []
    i = 0
    pattern = normalize_model_path(pattern)
    while i < len(pattern):
        if pattern.startswith("**/", i):
            out.append("(?:[^/]*/)*")  # zero or more whole folders
            i += 3
        elif pattern.startswith("**", i):
            out.append(".*")
            i += 2
        elif pattern[i] == "*":
            out.append("[^/]*")
            i += 1
        elif pattern[i] == "?":
            out.append("[^/]")
            i += 1
        elif pattern[i] == "[":
            end = pattern.find("]", i + 2)
            if end == -1:
                out.append(re.escape(pattern[i]))
                i += 1
                continue
            body = pattern[i + 1:end]
            if body.startswith("!"):
                body = "^" + body[1:]
            out.append("[" + body.replace("\\", "\\\\") + "]")
            i = end + 1
        else:
            out.append(re.escape(pattern[i]))
            i += 1
    return re.compile("".join(out) + r"\Z")


def match_model(pattern: str, path: str) -> bool:
    """Whether the model ``path`` matches the path glob ``pattern`` (whole path)."""
    return _path_regex(pattern).match(normalize_model_path(path)) is not None


def match_any(patterns: tuple[str, ...] | list[str], name: str) -> bool:
    """Whether ``name`` matches any of the shell patterns (case-sensitive)."""
    return any(fnmatchcase(name, p) for p in patterns)


def pattern_problem(pattern: str) -> str:
    """Why a pattern is unusable, or '' when it is fine (checked when a policy loads)."""
    if not pattern.strip():
        return "pattern is empty"
    if pattern.count("[") != pattern.count("]"):
        return f"pattern '{pattern}' has an unbalanced '['"
    try:
        _path_regex(pattern)
    except re.error as exc:
        return f"pattern '{pattern}' is not valid ({exc})"
    return ""
