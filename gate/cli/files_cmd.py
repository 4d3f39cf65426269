"""``roofgate evaluate``, ``roofgate baseline`` and ``roofgate diff``: model files given by name.

``evaluate`` judges the given models on their targets under their policies
(against a baseline snapshot when given), writes the requested reports and
exits 0 (pass, warnings allowed), 1 (an error-severity rule failed), 2 (bad
input, including a model that cannot be analysed) or 3 (internal error).
``baseline`` writes the snapshot a later ``evaluate --baseline`` compares
against. ``diff`` shows the per-layer diff of two models or two snapshots (or
one of each). Each reads roofgate.yaml like ``check`` does; flags replace it.
The work is done in ``gate.files``, ``gate.jobs`` and ``gate.compare``.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

import click

from gate.cli.common import (
    analysis_options,
    chosen_reports,
    finish,
    load_project,
    output_rules,
    start_reports,
)
from gate.errors import InputError
from gate.outfile import OutputRules, goes_to_stdout
from gate.records import RunRecord
from gate.report import report_options, report_paths, write_reports
from gate.report.text import term_safe
from gate.result import ModelError


def register(cli: click.Group) -> None:
    """Add ``evaluate``, ``baseline`` and ``diff`` to ``cli``."""
    cli.add_command(evaluate_command)
    cli.add_command(baseline_command)
    cli.add_command(diff_command)


# --- evaluate -------------------------------------------------------------------------

@click.command("evaluate", short_help="Judge model files given by name (no git needed).")
@click.argument("models", nargs=-1, required=True, metavar="MODEL...")
@analysis_options
@click.option("--policy", "-p", "policies", multiple=True, metavar="NAME|FILE",
              help="Policy: a built-in name (default, strict, nightly) or a YAML file "
                   "(repeatable; rule ids must be unique across policies; replaces the "
                   "config's policies).")
@click.option("--baseline", default=None, metavar="SNAPSHOT",
              help="Baseline snapshot (from `roofgate baseline`) for diffs and regression rules.")
@click.option("--date", "today", default=None, metavar="YYYY-MM-DD",
              type=click.DateTime(formats=["%Y-%m-%d"]),
              help="Judge waiver expiry on this date (default: today, UTC).")
@report_options
def evaluate_command(models: tuple[str, ...], baseline: str | None, today: datetime | None,
                     **kwargs: Any) -> None:
    """Judge MODEL... on every target under every policy (from the flags or roofgate.yaml).

    Exit codes: 0 pass (warnings allowed), 1 an error-severity rule failed,
    2 bad input or a model that could not be analysed (unless every policy sets
    allow_unanalysable), 3 internal error.
    """
    from gate.files import run_files

    config = load_project(kwargs)
    paths = chosen_reports(kwargs, config, defaults=False)
    rules = output_rules(kwargs, config, Path.cwd(), models)
    start_reports(paths, rules)
    result = run_files(config, models, baseline=baseline,
                       today=today.date() if today is not None else None)
    finish(result, paths, rules=rules)


# --- baseline -------------------------------------------------------------------------

@click.command("baseline", short_help="Write a baseline snapshot for later comparisons.")
@click.argument("models", nargs=-1, required=True, metavar="MODEL...")
@analysis_options
@click.option("--output", "-o", required=True, metavar="PATH",
              help="Snapshot file to write ('-' for stdout).")
def baseline_command(models: tuple[str, ...], output: str, **kwargs: Any) -> None:
    """Write a baseline snapshot of MODEL... on every target.

    The snapshot is deterministic JSON (same inputs, same bytes), so it can be
    committed and reviewed. Every model must analyse: a partial baseline would
    silently turn later regressions into "new model".
    """
    from gate.files import analyse_files
    from gate.snapshot import write_snapshot

    config = load_project(kwargs, policies=False)
    runs, errors, target_count = analyse_files(config, models)
    if errors:
        raise InputError(f"{errors[0].model}: {errors[0].message}{_also_failed(errors[1:])}; "
                         "no baseline written")
    _coverage_warnings(runs)  # a baseline of lower bounds (or unknowns) must not look complete
    write_snapshot(runs, output)
    if output != "-":
        click.echo(f"wrote {len(runs)} run(s) of {len(dict.fromkeys(models))} model(s) on "
                   f"{target_count} target(s) to {term_safe(output)}", err=True)


def _also_failed(errors: Sequence[ModelError], shown: int = 5) -> str:
    """' (also failed: b.onnx, c.onnx)': the other models by name, the rest counted."""
    if not errors:
        return ""
    names = ", ".join(term_safe(e.model) for e in errors[:shown])
    more = f" and {len(errors) - shown} more" if len(errors) > shown else ""
    return f" (also failed: {names}{more})"


# --- diff -----------------------------------------------------------------------------

@click.command("diff", short_help="Per-layer diff of two models or snapshots.")
@click.argument("old", metavar="OLD")
@click.argument("new", metavar="NEW")
@analysis_options
@click.option("--limit", default=20, show_default=True, type=click.IntRange(min=0), metavar="N",
              help="Changed layers to list per model x target (0 = all).")
@report_options
def diff_command(old: str, new: str, limit: int, **kwargs: Any) -> None:
    """Per-layer diff of OLD and NEW: two .onnx models, two snapshots, or one of each.

    Layers are matched by name, then by (op type, shapes) signature, so an
    exporter that renames every node still gives a meaningful diff. Models
    need a target (--target or roofgate.yaml); snapshots carry their targets.
    Exits 0 after printing the diff.
    """
    from gate.files import diff_sides
    from gate.report.difftext import render_diff

    paths = report_paths(kwargs)
    rules = OutputRules(inputs=(old, new, *kwargs["targets"]))
    start_reports(paths, rules)
    config = load_project(kwargs, policies=False)
    result = diff_sides(config, old, new, explicit_targets=bool(kwargs["targets"]))
    written = write_reports(result, paths, rules)
    to_stdout = any(goes_to_stdout(path) for path in paths.values() if path)
    _coverage_warnings([run for e in result.entries for run in (e.base, e.head) if run])
    click.echo(render_diff(result, limit, written, (old, new)), nl=False, err=to_stdout)


def _coverage_warnings(runs: Sequence[RunRecord]) -> None:
    """One ``warning:`` line on stderr per partly or not costed record, with the remedy."""
    from gate.records import coverage_note

    for note in dict.fromkeys(coverage_note(run) for run in runs):
        if note:
            click.echo(f"warning: {term_safe(note)}", err=True)
