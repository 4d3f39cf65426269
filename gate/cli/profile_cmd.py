"""``roofgate profile MODEL``: per-layer counts, bytes and coverage; per-target costs with targets.

Analyses the model through ``gate.jobs.analyse_model`` (the one analysis path
every command shares) with the settings of roofgate.yaml and the flags; the
renderers in ``gate.report.profile_text`` only format. ``docs/profile.md``
documents the JSON and CSV field names.
"""

from __future__ import annotations

from typing import Any

import click

from gate.cli.common import (
    config_option,
    dim_option,
    load_project,
    precision_option,
    shape_option,
    target_option,
)
from gate.errors import InputError
from gate.gcpause import cyclic_gc_paused
from gate.report.text import one_line, term_safe


def register(cli: click.Group) -> None:
    """Add the ``profile`` command to ``cli``."""
    cli.add_command(profile)


@click.command("profile", short_help="Per-layer counts and costs of one model.")
@click.argument("model", metavar="MODEL")
@config_option()
@target_option("Cost the model on a target: a built-in name (see `roofgate targets`) or a "
               "YAML file (repeatable: several targets give a side-by-side matrix; replaces "
               "the config's targets).")
@dim_option()
@shape_option()
@precision_option()
@click.option("--no-fusion", "no_fusion", is_flag=True,
              help="Cost every layer alone, ignoring the target's 'fusion:' section (what fusion "
                   "buys is the difference).")
@click.option("--format", "fmt", type=click.Choice(["table", "json", "csv"]), default="table",
              show_default=True, help="table for terminals; json and csv for machines.")
def profile(model: str, fmt: str, no_fusion: bool, **kwargs: Any) -> None:
    """Profile MODEL (an .onnx file) layer by layer, analytically; no weights are read.

    Prints each layer's MACs, FLOPs, parameter and activation bytes, arithmetic
    intensity and parameter reuse, the model totals and the op coverage (which
    layers could not be counted, and why). Each target (--target, or the
    model's targets in roofgate.yaml) adds a group of columns (utilization,
    bound, latency per layer) and a line of model totals (latency, energy, DRAM
    traffic); JSON and CSV carry every per-layer figure. Targets that declare
    fusion cost each fused group as one layer on its head (the absorbed layers
    show 'fusion-member'); --no-fusion costs layer by layer.
    """
    if not model.strip():
        raise InputError("empty model path; pass the .onnx file to profile")
    with cyclic_gc_paused():  # the analysis and its table: no cycles worth collecting
        _profile(model, fmt, no_fusion, kwargs)


def _profile(model: str, fmt: str, no_fusion: bool, kwargs: dict[str, Any]) -> None:
    from gate.config import resolve_target
    from gate.jobs import analyse_model
    from gate.report.profile_text import render_chunks
    from gate.targets import load_target

    config = load_project(kwargs, policies=False)
    settings = config.settings_for(model)
    names = dict.fromkeys(resolve_target(config, t) for t in settings.targets)
    targets = [load_target(name) for name in names]  # a target given twice is costed once
    analysis = analyse_model(model, targets, dims=settings.dims, precision=settings.precision,
                             shapes=settings.shapes, fusion=not no_fusion)
    target_warnings = [w for target in targets for w in target.warnings]
    for warning in [*analysis.loaded.warnings, *target_warnings]:  # terminal-safe: model names
        click.echo(f"warning: {term_safe(one_line(warning))}", err=True)
    if analysis.loaded.unbound_dims and fmt != "table":  # the table states the hint once
        binds = " ".join(f"--dim {term_safe(one_line(d))}=N" for d in analysis.loaded.unbound_dims)
        click.echo(f"warning: unbound symbolic dims leave layers unmodelled; bind them with "
                   f"{binds} (or size whole inputs with --shape INPUT=SHAPE)", err=True)
    for chunk in render_chunks(fmt, analysis.profile, list(analysis.costs),
                               list(analysis.records)):
        click.echo(chunk, nl=False)


