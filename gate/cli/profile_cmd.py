"""``roofgate profile MODEL``: per-layer counts, bytes and coverage; per-target costs with --target.

Loads the model (``gate.model.loader``), profiles it (``gate.profile``) and, for
each ``--target``, costs it (``gate.costmodel``) and flattens it into a
``RunRecord`` (``gate.summarize``); the renderers in ``gate.cli.profile_render``
only format. ``docs/profile.md`` documents the JSON and CSV field names.
"""

from __future__ import annotations

import click

from gate.cli.common import dim_option, precision_option, target_option
from gate.cli.profile_render import render
from gate.costmodel import cost_model
from gate.errors import InputError
from gate.model.loader import load_model
from gate.profile import profile_model
from gate.report.text import one_line, term_safe
from gate.summarize import build_run_record
from gate.targets import load_target


def register(cli: click.Group) -> None:
    """Add the ``profile`` command to ``cli``."""
    cli.add_command(profile)


@click.command("profile", short_help="Per-layer counts and costs of one model.")
@click.argument("model", metavar="MODEL")
@target_option("Cost the model on a target: a built-in name (see `roofgate targets`) or a "
               "YAML file (repeatable: several targets give a side-by-side matrix).")
@dim_option()
@precision_option()
@click.option("--format", "fmt", type=click.Choice(["table", "json", "csv"]), default="table",
              show_default=True, help="table for terminals; json and csv for machines.")
def profile(model: str, dims: dict[str, int], precision: str | None, targets: tuple[str, ...],
            fmt: str) -> None:
    """Profile MODEL (an .onnx file) layer by layer, analytically; no weights are read.

    Prints each layer's MACs, FLOPs, parameter and activation bytes, arithmetic
    intensity and parameter reuse, the model totals and the op coverage (which
    layers could not be counted, and why). Each --target adds a group of
    columns (utilization, bound, latency per layer) and a line of model totals
    (latency, energy, DRAM traffic); JSON and CSV carry every per-layer figure.
    """
    if not model.strip():
        raise InputError("empty model path; pass the .onnx file to profile")
    loaded = load_model(model, dims)
    result = profile_model(loaded, precision)
    runs = []
    for name in dict.fromkeys(targets):  # a target given twice is costed once
        target = load_target(name)
        runs.append((target, cost_model(result, target)))
    records = [build_run_record(model, result, cost, target) for target, cost in runs]
    for warning in loaded.warnings:  # they quote model-supplied names: made terminal-safe
        click.echo(f"warning: {term_safe(one_line(warning))}", err=True)
    if loaded.unbound_dims:
        binds = " ".join(f"--dim {term_safe(one_line(d))}=N" for d in loaded.unbound_dims)
        click.echo(f"warning: unbound symbolic dims leave layers unmodelled; bind them with "
                   f"{binds}", err=True)
    click.echo(render(fmt, result, runs, records), nl=False)
