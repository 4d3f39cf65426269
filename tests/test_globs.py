"""The one path-glob implementation (gate/globs.py) behind config model groups and policy scopes.

Per-folder semantics are checked against the standard library: within one path part a
glob matches like ``fnmatch.fnmatchcase`` (Python standard library documentation).
"""

from __future__ import annotations

from fnmatch import fnmatchcase

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from gate.config import glob_match, glob_problem
from gate.globs import path_match
from gate.policy.globs import match_model, pattern_problem

CASES = [
    ("models/**/*.onnx", "models/species.onnx", True),
    ("models/*.onnx", "models/x/a.onnx", False),
    ("models/[a-c]?.onnx", "models/b1.onnx", True),
    ("models/[!a-c]*.onnx", "models/b1.onnx", False),
    ("models/[^a].onnx", "models/^.onnx", True),  # '^' is a member, as in fnmatch
    ("models/[]x].onnx", "models/].onnx", True),  # ']' first is a member, as in fnmatch
    ("models/[x.onnx", "models/[x.onnx", True),  # unclosed '[' is literal
    ("m (1)/*.onnx", "m (1)/a.onnx", True),  # regex characters are literal
    ("**", "odd\nname.onnx", True),  # a newline in a file name does not hide it
]


@pytest.mark.parametrize(("pattern", "path", "expected"), CASES)
def test_config_and_policy_globs_agree(pattern: str, path: str, expected: bool) -> None:
    assert path_match(pattern, path) is expected
    assert glob_match(pattern, path) is expected
    assert match_model(pattern, path) is expected


def test_an_invalid_class_is_a_load_problem_in_both() -> None:
    assert "not valid" in glob_problem("models/[z-a].onnx")
    assert "not valid" in pattern_problem("models/[z-a].onnx")
    assert not glob_problem("models/[a-z]*.onnx") and not pattern_problem("models/[a-z]*.onnx")


_part = st.text(alphabet="ab^!-[].", min_size=1, max_size=5)


@settings(max_examples=150, deadline=None)
@given(_part, st.text(alphabet="ab^!-[].", min_size=1, max_size=4))
@example("[[--]", "[")  # a '--' in a class once reached the regex as a set difference
@example("[a-c-e]", "-")
def test_one_part_matches_like_fnmatch(pattern: str, name: str) -> None:
    if glob_problem(pattern):
        return  # rejected when the file loads; never matched
    assert path_match(pattern, name) == fnmatchcase(name, pattern)
