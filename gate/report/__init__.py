"""Reporters: each formats one ``GateResult``; none recomputes anything.

A reporter is a tiny protocol (a name, the command-line option that asks for
it, and ``write(result, stream)``), one module per format. ``write_report``
owns the output file: ``-`` means stdout, parent folders are created, and a
half-written file is removed if the reporter fails.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from typing import Protocol, TextIO, TypeVar

import click

from gate.outfile import open_output
from gate.result import GateResult

# One module per format; each defines ``REPORTER``.
_REPORTER_MODULES = (
    "gate.report.junit",
    "gate.report.markdown",
    "gate.report.jsonout",
    "gate.report.html",
    "gate.report.sarif",
    "gate.report.annotations",
)


class Reporter(Protocol):
    name: str  # "junit", "markdown", ...; also the command-line option (--junit PATH)
    help: str  # one line for --help

    def write(self, result: GateResult, stream: TextIO) -> None: ...


def all_reporters() -> list[Reporter]:
    """Every available reporter, in a fixed order."""
    return [importlib.import_module(name).REPORTER for name in _REPORTER_MODULES]


def write_report(reporter: Reporter, result: GateResult, path: str) -> None:
    """Write one report to ``path`` ('-' = stdout), atomically for files."""
    with open_output(path, f"{reporter.name} report") as stream:
        reporter.write(result, stream)


def write_reports(result: GateResult, paths: dict[str, str | None]) -> list[str]:
    """Write every report whose path is set; returns the paths written."""
    written = []
    for reporter in all_reporters():
        path = paths.get(reporter.name)
        if path:
            write_report(reporter, result, path)
            written.append(path)
    return written


F = TypeVar("F", bound=Callable[..., object])


def report_options(func: F) -> F:
    """Add ``--<name> PATH`` for every reporter to a click command (kwargs ``<name>``)."""
    for reporter in reversed(all_reporters()):
        func = click.option(
            f"--{reporter.name}", reporter.name, metavar="PATH", default=None,
            help=f"{reporter.help} ('-' for stdout).",
        )(func)
    return func


def report_paths(kwargs: dict[str, object]) -> dict[str, str | None]:
    """Pick the reporter paths out of a command's kwargs."""
    return {r.name: kwargs.get(r.name) for r in all_reporters()}  # type: ignore[misc]
