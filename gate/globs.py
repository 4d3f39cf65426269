"""Repository path globs, shared by the project config (model groups) and policy scopes.

A glob is matched against the whole repository-relative path: ``*`` and ``?``
stay inside one folder, ``**`` spans any number of folders (``**/`` also none),
``[abc]``, ``[a-z]`` and ``[!abc]`` are character classes as in ``fnmatch``
(a ``[`` without a closing ``]`` is literal). Every other character, regex
syntax included, is literal. Matching is case-sensitive, as git paths are.
"""

from __future__ import annotations

import re
from functools import lru_cache


def normalize_path(path: str) -> str:
    """Forward slashes and no leading './', so 'models\\\\a.onnx' and './models/a.onnx' match."""
    text = path.replace("\\", "/")
    while text.startswith("./"):
        text = text[2:]
    return text


@lru_cache(maxsize=512)
def path_regex(pattern: str) -> re.Pattern[str]:
    """The compiled regex of a path glob (cached); raises ``re.error`` for a bad class."""
    out: list[str] = []
    i = 0
    pattern = normalize_path(pattern)
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
        elif pattern[i] == "[" and "]" in pattern[i + 2:]:
            end = pattern.index("]", i + 2)  # a ']' right after '[' is a member, as in fnmatch
            out.append(_char_class(pattern[i + 1:end]))
            i = end + 1
        else:
            out.append(re.escape(pattern[i]))
            i += 1
    return re.compile("".join(out), re.DOTALL)


def _char_class(body: str) -> str:
    """'[!a-c]' body as a regex class: '!' negates, '-' makes ranges, all else is literal."""
    negate = body.startswith("!")
    chars = body[1:] if negate else body
    members: list[str] = []
    for i, char in enumerate(chars):
        # a '-' between two members makes a range; any other '-' (first, last, or right
        # after a range's '-') is literal, so no '--' reaches the regex (a set difference)
        is_range = (char == "-" and 0 < i < len(chars) - 1 and members[-1] != "-")
        members.append("-" if is_range else re.escape(char))
    return f"[{'^' if negate else ''}{''.join(members)}]"


def path_match(pattern: str, path: str) -> bool:
    """Whether ``path`` (either slash) matches the glob ``pattern`` as a whole."""
    return path_regex(pattern).fullmatch(normalize_path(path)) is not None


def path_glob_problem(pattern: str) -> str:
    """Why ``pattern`` cannot be compiled as a glob (e.g. a reversed range), or ''."""
    try:
        path_regex(pattern)
    except re.error as exc:
        return f"pattern '{pattern}' is not valid ({exc})"
    return ""
