"""Options and the closing step shared by several commands, so they read and behave alike.

Every command that costs a model takes the same ``--target/-t``, ``--dim`` and
``--precision`` options (same names, metavars, help and parsing); every command
that judges a result ends the same way: write the reports, print the terminal
summary, exit with the result's code.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, TypeVar

import click

from gate.outfile import TYPED_PATHS, OutputRules, check_output_paths, remove_stale
from gate.report import report_targets, terminal, write_reports
from gate.result import GateResult

F = TypeVar("F", bound=Callable[..., Any])

TARGET_HELP = ("Target profile: a built-in name (see `roofgate targets`) or a YAML file "
               "(repeatable).")
DIM_HELP = "Bind a symbolic input dim, e.g. --dim seq=256 (repeatable)."
PRECISION_HELP = ("Count floating-point tensors' bytes at this deploy precision (int4, int8, "
                  "int16, fp8, fp16, bf16, fp32; default: as exported). MACs never change.")


def parse_dims(ctx: click.Context | None, param: click.Parameter | None,
               values: tuple[str, ...]) -> dict[str, int]:
    """``("batch=1", "seq=128")`` -> ``{"batch": 1, "seq": 128}``; a usage error (exit 2) otherwise.

    A dim is a positive integer: a zero-length input is no deployment anyone
    gates, and the project config refuses it too.
    """
    dims: dict[str, int] = {}
    for text in values:
        name, sep, number = (part.strip() for part in text.partition("="))
        if not sep or not name or not number.isdigit() or int(number) < 1:
            raise click.BadParameter(f"'{text}': expected NAME=N with N a positive integer, "
                                     "e.g. --dim seq=256", ctx=ctx, param=param)
        if dims.get(name, int(number)) != int(number):
            raise click.BadParameter(f"'{name}' bound twice ({dims[name]} and {number})",
                                     ctx=ctx, param=param)
        dims[name] = int(number)
    return dims


def target_option(help_text: str = TARGET_HELP) -> Callable[[F], F]:
    """``--target/-t NAME|FILE`` (repeatable) into the ``targets`` tuple."""
    return click.option("--target", "-t", "targets", multiple=True, metavar="NAME|FILE",
                        help=help_text)


def dim_option(help_text: str = DIM_HELP) -> Callable[[F], F]:
    """``--dim NAME=N`` (repeatable) parsed into the ``dims`` dict."""
    return click.option("--dim", "dims", multiple=True, metavar="NAME=N", callback=parse_dims,
                        help=help_text)


def precision_option(help_text: str = PRECISION_HELP) -> Callable[[F], F]:
    """``--precision TYPE`` into ``precision`` (None: as exported)."""
    return click.option("--precision", default=None, metavar="TYPE", help=help_text)


def analysis_options(func: F) -> F:
    """``--target/-t``, ``--dim`` and ``--precision`` with their standard help."""
    for option in reversed((target_option(), dim_option(), precision_option())):
        func = option(func)
    return func


def start_reports(paths: dict[str, str | None], rules: OutputRules) -> None:
    """Before any analysis: refuse report paths ``rules`` forbid, delete an earlier run's reports.

    So an early exit (bad input, a crash) never leaves an old report that
    reads as this run's result.
    """
    targets = report_targets(paths)
    check_output_paths(targets, rules)
    remove_stale(list(targets.values()))


def finish(result: GateResult, paths: dict[str, str | None], title: str | None = None,
           extra_written: Sequence[str] = (), rules: OutputRules = TYPED_PATHS) -> None:
    """Write the reports, print the summary (to stderr when a report goes to stdout), exit."""
    written = write_reports(result, paths, rules)
    to_stdout = any(path == "-" for path in paths.values())
    click.echo(terminal.render(result, [*written, *extra_written], title), nl=False,
               err=to_stdout)
    raise click.exceptions.Exit(result.exit_code)
