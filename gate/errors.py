"""The one root of user-facing errors, and the exit codes the CLI maps them to.

Exit codes (documented in the README):
  0  the gate passed (warnings allowed)
  1  at least one error-severity rule failed
  2  bad input or usage (unreadable model, bad YAML, unknown target, ...)
  3  internal error (a bug in roofgate; never reads as pass or as findings)
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Callable, Iterable

import click

from gate.logsafe import defuse_runner_markers

EXIT_PASS = 0
EXIT_GATE_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3


# Characters a terminal acts on (escape sequences, bell, backspace, C1 controls) and
# line separators; messages quote model-supplied names, which may hold any of them.
_TERMINAL_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def one_safe_line(text: str) -> str:
    """``text`` as one line with no terminal control characters (shown as ``\\x1b``)
    and no CI runner log marker (``##[error]``; see gate/logsafe)."""
    joined = defuse_runner_markers(" ".join(text.splitlines()))
    return _TERMINAL_CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}"
                                 if ord(m.group()) <= 0xFF else f"\\u{ord(m.group()):04x}",
                                 joined)


class RoofgateError(click.ClickException):
    """A problem the user can fix; printed as one line, no traceback."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, message: str, path: str | None = None) -> None:
        self.path = path
        text = f"{path}: {message}" if path else message
        super().__init__(text)

    def rename_paths(self, named: Callable[[str], str]) -> None:
        """Rewrite the file names in the message (a file read from a temporary copy)."""
        self.message = named(self.message)  # type: ignore[misc]  # click marks it Final

    def format_message(self) -> str:
        # One line, always: a model-supplied newline must not forge extra output lines,
        # nor an escape sequence in a node name act on the user's terminal.
        return one_safe_line(self.message)


class InputError(RoofgateError):
    """The input (model, YAML, snapshot, git ref) cannot be analysed."""


class ConfigError(RoofgateError):
    """A YAML file (target, policy, project config) failed validation.

    Carries every problem found in the file, each already prefixed with its
    ``file:line: key.path``; the CLI prints them one per line.
    """

    def __init__(self, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__(self.problems[0] if self.problems else "invalid configuration")

    def rename_paths(self, named: Callable[[str], str]) -> None:
        super().rename_paths(named)
        self.problems = [named(problem) for problem in self.problems]

    def format_message(self) -> str:
        extra = len(self.problems) - 1
        lines = [one_safe_line(p) for p in self.problems]
        if extra > 0:
            return "\n".join(lines)
        return lines[0] if lines else "invalid configuration"


class InternalError(RoofgateError):
    """A bug in roofgate. Distinct exit code so a crash never reads as a pass."""

    exit_code = EXIT_INTERNAL


def near_name(word: str, names: Iterable[str]) -> str | None:
    """The one of ``names`` that ``word`` most likely misspells, or None (difflib's ratio
    of at least 0.6, as every "did you mean" of roofgate uses)."""
    close = difflib.get_close_matches(word, sorted(names), n=1, cutoff=0.6)
    return close[0] if close else None
