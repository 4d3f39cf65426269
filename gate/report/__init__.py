"""Reporters: each formats one ``GateResult``; none recomputes anything.

A reporter is a tiny protocol (a name, the command-line option that asks for
it, and ``write(result, stream)``), one module per format. ``write_reports``
has every asked-for report written to its partial file by ``gate.outfile``
(reports for stdout are rendered in memory first), and the files are renamed
into place only when every renderer succeeded, so no report file can
contradict the exit code (a renderer that fails leaves no report at all,
never a "passed" beside an internal error). A large report (the JSON of a
200k-node check) thus goes to disk in pieces, never whole in memory.
"""

from __future__ import annotations

import importlib
import io
from collections.abc import Callable, Sequence
from functools import partial
from typing import Protocol, TextIO, TypeVar, cast

import click

from gate.outfile import (
    TYPED_PATHS,
    Content,
    OutputRules,
    Parts,
    Writer,
    check_output_paths,
    write_files,
    write_text,
)
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


class PartsReporter(Reporter, Protocol):
    """A reporter whose file can be rendered in consecutive parts side by side (the JSON
    report: the bulk of a large run's report time)."""

    def write_parts(self, result: GateResult, parts: int) -> Sequence[Writer]: ...


def all_reporters() -> list[Reporter]:
    """Every available reporter, in a fixed order."""
    return [importlib.import_module(name).REPORTER for name in _REPORTER_MODULES]


def render_report(reporter: Reporter, result: GateResult) -> str:
    """One report as text, in memory."""
    stream = io.StringIO()
    reporter.write(result, stream)
    return stream.getvalue()


def write_report(reporter: Reporter, result: GateResult, path: str) -> None:
    """Render one report, then write it to ``path`` ('-' = stdout), atomically for files."""
    write_text(path, render_report(reporter, result), f"{reporter.name} report")


def report_targets(paths: dict[str, str | None]) -> dict[str, str]:
    """``{"junit report": path, ...}`` for every report whose path is set."""
    return {f"{r.name} report": paths[r.name] for r in all_reporters()  # type: ignore[misc]
            if paths.get(r.name)}


def write_reports(result: GateResult, paths: dict[str, str | None],
                  rules: OutputRules = TYPED_PATHS, processes: int = 1) -> list[str]:
    """Render every report whose path is set, then write them all; returns the paths written.

    Paths are checked against ``rules`` first (exit 2 when one may not be
    written); nothing is written unless every renderer succeeded. With
    ``processes`` > 1 (a ``-j N`` run) the report files are rendered side by side.
    """
    check_output_paths(report_targets(paths), rules)
    rendered: list[tuple[str, str, Content]] = []
    for reporter in all_reporters():
        path = paths.get(reporter.name)
        if path:
            rendered.append((path, f"{reporter.name} report",
                             _content(reporter, result, path, processes)))
    write_files(rendered, processes)
    return [path for path, _, _ in rendered]


def _content(reporter: Reporter, result: GateResult, path: str, processes: int) -> Content:
    """What ``write_files`` writes a report from: its text for stdout, else its writer, or
    its parts when it has them and there are processes to render them side by side."""
    if path == "-":
        return render_report(reporter, result)
    if processes > 1 and hasattr(reporter, "write_parts"):
        return Parts(partial(cast(PartsReporter, reporter).write_parts, result))
    return partial(reporter.write, result)


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
