"""Options and the closing step shared by several commands, so they read and behave alike.

Every command that costs a model takes the same ``--config``, ``--target/-t``,
``--dim``, ``--shape`` and ``--precision`` options (same names, metavars, help and
parsing) and reads the project config the same way (``load_project``: the
``roofgate.yaml`` found from the current folder upward, or ``--config``, with
the flags replacing its settings); every command that judges a result ends the
same way: write the reports, print the terminal summary, exit with the
result's code.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TypeVar

import click

from gate.bundled import looks_like_path, names_a_file
from gate.config import (
    DEFAULT_REPORTS,
    Overrides,
    ProjectConfig,
    load_config,
    resolve_file,
    resolve_target,
)
from gate.errors import InputError
from gate.model.graph import INT64_MAX
from gate.model.shape_text import StaticShape, parse_shape_binding, shape_text
from gate.outfile import (
    TYPED_PATHS,
    OutputRules,
    check_output_paths,
    goes_to_stdout,
    remove_stale,
)
from gate.report import report_paths, report_targets, terminal, write_reports
from gate.report.text import shorten
from gate.result import GateResult

F = TypeVar("F", bound=Callable[..., Any])

TARGET_HELP = ("Target profile: a built-in name (see `roofgate targets`) or a YAML file "
               "(repeatable).")
DIM_HELP = "Bind a symbolic input dim, e.g. --dim seq=256 (repeatable)."
SHAPE_HELP = ("Bind every dim of a graph input, e.g. --shape images=1x3x640x640 (repeatable; "
              "also unnamed and -1 dims, and H and W sharing one name).")
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
        if not sep or not name or not number.isdigit() or not 1 <= int(number) <= INT64_MAX:
            raise click.BadParameter(f"'{shorten(text, 60)}': expected NAME=N with N a positive "
                                     f"integer up to {INT64_MAX} (int64), e.g. --dim seq=256",
                                     ctx=ctx, param=param)
        if dims.get(name, int(number)) != int(number):
            raise click.BadParameter(f"'{name}' bound twice ({dims[name]} and {number})",
                                     ctx=ctx, param=param)
        dims[name] = int(number)
    return dims


def parse_shapes(ctx: click.Context | None, param: click.Parameter | None,
                 values: tuple[str, ...]) -> dict[str, StaticShape]:
    """``("images=1x3x640x640",)`` -> ``{"images": (1, 3, 640, 640)}``.

    Bad text is one line and exit 2 (``InputError``), never a traceback; whether
    the input exists and has that rank is checked when the model is loaded.
    """
    shapes: dict[str, StaticShape] = {}
    for text in values:
        try:
            name, shape = parse_shape_binding(text)
        except ValueError as exc:
            raise InputError(f"--shape {exc}") from None
        if shapes.get(name, shape) != shape:
            raise InputError(f"--shape: input '{name}' is bound twice ({shape_text(shapes[name])} "
                             f"and {shape_text(shape)}); give it once")
        shapes[name] = shape
    return shapes


def target_option(help_text: str = TARGET_HELP) -> Callable[[F], F]:
    """``--target/-t NAME|FILE`` (repeatable) into the ``targets`` tuple."""
    return click.option("--target", "-t", "targets", multiple=True, metavar="NAME|FILE",
                        help=help_text)


def dim_option(help_text: str = DIM_HELP) -> Callable[[F], F]:
    """``--dim NAME=N`` (repeatable) parsed into the ``dims`` dict."""
    return click.option("--dim", "dims", multiple=True, metavar="NAME=N", callback=parse_dims,
                        help=help_text)


def shape_option(help_text: str = SHAPE_HELP) -> Callable[[F], F]:
    """``--shape INPUT=D1xD2x...`` (repeatable) parsed into the ``shapes`` dict."""
    return click.option("--shape", "shapes", multiple=True, metavar="INPUT=SHAPE",
                        callback=parse_shapes, help=help_text)


def precision_option(help_text: str = PRECISION_HELP) -> Callable[[F], F]:
    """``--precision TYPE`` into ``precision`` (None: as exported)."""
    return click.option("--precision", default=None, metavar="TYPE", help=help_text)


CONFIG_HELP = ("Project config (default: the roofgate.yaml in the current folder or the nearest "
               "one above it, up to the repository root).")


def config_option(help_text: str = CONFIG_HELP) -> Callable[[F], F]:
    """``--config FILE`` into ``config_path`` (None: search for roofgate.yaml)."""
    return click.option("--config", "config_path", metavar="FILE", default=None, help=help_text)


def analysis_options(func: F) -> F:
    """``--config``, ``--target/-t``, ``--dim``, ``--shape`` and ``--precision`` with their
    standard help."""
    for option in reversed((config_option(), target_option(), dim_option(), shape_option(),
                            precision_option())):
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


def load_project(kwargs: dict[str, Any], *, root: str | Path = ".", policies: bool = True,
                 require_targets: bool = False) -> ProjectConfig:
    """The project config with the command-line flags in ``kwargs`` replacing its settings.

    Paths given on the command line are taken from the current folder; paths in
    the file from the file's folder.
    """
    overrides = Overrides(
        targets=tuple(_cli_ref(t) for t in kwargs.get("targets", ())),
        policies=tuple(_cli_ref(p) for p in kwargs.get("policies", ())) if policies else (),
        dims=kwargs.get("dims") or {},
        precision=kwargs.get("precision"),
        shapes=kwargs.get("shapes") or {},
    )
    return load_config(kwargs.get("config_path"), root=root, overrides=overrides,
                       require_targets=require_targets)


def _cli_ref(ref: str) -> str:
    """A target or policy from the command line: a built-in name unchanged, a file made absolute."""
    return str(Path(ref).resolve()) if looks_like_path(ref) else ref


def chosen_reports(kwargs: dict[str, Any], config: ProjectConfig,
                   defaults: bool = True) -> dict[str, str | None]:
    """Report paths: command-line flags over the config's; the defaults (when ``defaults``)
    stand in only when neither asks for any report."""
    flags = {k: v for k, v in report_paths(kwargs).items() if v}
    if not config.reports and (flags or not defaults):
        return dict(flags)
    chosen: dict[str, str | None] = dict(config.reports or DEFAULT_REPORTS)
    chosen.update(flags)
    return chosen


def output_rules(kwargs: dict[str, Any], config: ProjectConfig, root: str | Path,
                 inputs: Sequence[str] = ()) -> OutputRules:
    """Reports stay inside the working tree (unless typed on the command line), out of
    ``.git``, and off every file the run reads: config, policies, targets, baseline, models."""
    read = [config.source or "", kwargs.get("baseline") or "", *inputs]
    groups = (*config.groups, config.defaults)
    read += [resolve_file(config, p) for g in groups for p in g.policies if names_a_file(p)]
    read += [resolve_target(config, t) for g in groups for t in g.targets if names_a_file(t)]
    typed = tuple(v for v in report_paths(kwargs).values() if v)
    return OutputRules(root=str(root), inputs=tuple(r for r in read if r),
                       is_model=config.is_model, typed=typed)


def finish(result: GateResult, paths: dict[str, str | None], title: str | None = None,
           extra_written: Sequence[str] = (), rules: OutputRules = TYPED_PATHS,
           processes: int = 1) -> None:
    """Write the reports (side by side when ``processes`` > 1), print the summary (to
    stderr when a report goes to stdout), exit."""
    written = write_reports(result, paths, rules, processes)
    to_stdout = any(goes_to_stdout(path) for path in paths.values() if path)
    click.echo(terminal.render(result, [*written, *extra_written], title), nl=False,
               err=to_stdout)
    raise click.exceptions.Exit(result.exit_code)
