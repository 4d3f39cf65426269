"""``roofgate gate``, ``roofgate baseline`` and ``roofgate diff``: the gate on explicit files.

``gate`` analyses the given models on the given targets, judges them under the
policies (against a baseline snapshot when given), writes the requested reports
and exits 0 (pass, warnings allowed), 1 (an error-severity rule failed) or 2
(bad input, including a model that cannot be analysed). ``baseline`` writes the
snapshot a later ``gate --baseline`` compares against. ``diff`` shows the
per-layer diff of two models or two snapshots (or one of each).
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any

import click

from gate.audit import error_text
from gate.cli.common import analysis_options, finish, start_reports
from gate.diff import ranked_changes
from gate.errors import InputError, InternalError, RoofgateError
from gate.outfile import OutputRules
from gate.pipeline import analyse, judge
from gate.policy import load_policies, unused_waivers
from gate.policy.globs import normalize_model_path
from gate.records import RunRecord
from gate.report import report_options, report_paths, terminal, write_reports
from gate.report.text import fmt_change, fmt_metric, shorten, term_safe
from gate.result import GateResult, ModelError
from gate.snapshot import read_snapshot, write_snapshot
from gate.targets import load_targets
from gate.targets.spec import TargetProfile


def register(cli: click.Group) -> None:
    """Add ``gate``, ``baseline`` and ``diff`` to ``cli``."""
    cli.add_command(gate_command)
    cli.add_command(baseline_command)
    cli.add_command(diff_command)


# --- gate -----------------------------------------------------------------------------

@click.command("gate", short_help="Gate given models on targets under policy files.")
@click.argument("models", nargs=-1, required=True, metavar="MODEL...")
@analysis_options
@click.option("--policy", "-p", "policies", multiple=True, required=True, metavar="FILE",
              help="Policy file (repeatable; rule ids must be unique across files).")
@click.option("--baseline", default=None, metavar="SNAPSHOT",
              help="Baseline snapshot (from `roofgate baseline`) for diffs and regression rules.")
@click.option("--date", "today", default=None, metavar="YYYY-MM-DD",
              type=click.DateTime(formats=["%Y-%m-%d"]),
              help="Judge waiver expiry on this date (default: today, UTC).")
@report_options
def gate_command(models: tuple[str, ...], targets: tuple[str, ...], dims: dict[str, int],
                 precision: str | None, policies: tuple[str, ...], baseline: str | None,
                 today: datetime | None, **kwargs: Any) -> None:
    """Gate MODEL... on every --target under every --policy.

    Exit codes: 0 pass (warnings allowed), 1 an error-severity rule failed,
    2 bad input or a model that could not be analysed (unless every policy sets
    allow_unanalysable), 3 internal error.
    """
    rules = OutputRules(inputs=(*models, *policies, *targets, baseline or ""))
    start_reports(report_paths(kwargs), rules)
    loaded_targets = _targets(targets)
    loaded_policies = load_policies(policies)
    base_runs = read_snapshot(baseline) if baseline else ()
    head, errors = _analyse_all(models, loaded_targets, dims, precision)
    wanted = {run.key for run in head}
    base = [run for run in base_runs if run.key in wanted]
    notes = _baseline_notes(baseline, head, base)
    result = judge(head, base, loaded_policies, command="gate", today=_day(today),
                   errors=errors, notes=notes)
    verdicts = [v for entry in result.entries for v in entry.verdicts]
    result = _with_notes(result, unused_waivers(loaded_policies, verdicts))
    finish(result, report_paths(kwargs), rules=rules)


def _targets(names: Sequence[str]) -> list[TargetProfile]:
    if not names:
        raise click.UsageError("give at least one --target (a built-in name, see "
                               "`roofgate targets`, or a target YAML file)")
    return load_targets(tuple(dict.fromkeys(names)))


def _analyse_all(models: Sequence[str], targets: Sequence[TargetProfile], dims: dict[str, int],
                 precision: str | None) -> tuple[list[RunRecord], list[ModelError]]:
    """Records of every model; a model that cannot be analysed becomes a ModelError."""
    runs: list[RunRecord] = []
    errors: list[ModelError] = []
    for path in dict.fromkeys(models):
        shown = normalize_model_path(path)
        try:
            runs.extend(analyse(path, targets, dims=dims, precision=precision, shown_path=shown))
        except InternalError:
            raise  # roofgate's own bug (exit 3), not a model that cannot be analysed (exit 2)
        except RoofgateError as exc:
            message = error_text(exc.format_message(), str(exc.path)) if exc.path else \
                exc.format_message()
            errors.append(ModelError(shown, message))  # reports name the model already
    return runs, errors


def _baseline_notes(baseline: str | None, head: list[RunRecord],
                    base: list[RunRecord]) -> list[str]:
    if not baseline:
        return ["no baseline given: no diffs, and regression rules compare against nothing"]
    missing = sorted({r.model for r in head} - {r.model for r in base})
    return [f"{model}: not in the baseline {baseline}; judged as a new model"
            for model in missing]


def _with_notes(result: GateResult, notes: Sequence[str]) -> GateResult:
    if not notes:
        return result
    return GateResult(result.command, result.policies, result.entries, result.errors,
                      tuple(dict.fromkeys((*result.notes, *notes))), result.allow_errors)


def _day(value: datetime | None) -> date:
    return value.date() if value is not None else datetime.now(timezone.utc).date()


# --- baseline -------------------------------------------------------------------------

@click.command("baseline", short_help="Write a baseline snapshot for later comparisons.")
@click.argument("models", nargs=-1, required=True, metavar="MODEL...")
@analysis_options
@click.option("--output", "-o", required=True, metavar="PATH",
              help="Snapshot file to write ('-' for stdout).")
def baseline_command(models: tuple[str, ...], targets: tuple[str, ...], dims: dict[str, int],
                     precision: str | None, output: str) -> None:
    """Write a baseline snapshot of MODEL... on every --target.

    The snapshot is deterministic JSON (same inputs, same bytes), so it can be
    committed and reviewed. Every model must analyse: a partial baseline would
    silently turn later regressions into "new model".
    """
    loaded_targets = _targets(targets)
    head, errors = _analyse_all(models, loaded_targets, dims, precision)
    if errors:
        raise InputError(f"{errors[0].model}: {errors[0].message}"
                         + (f" (and {len(errors) - 1} more models failed)" if len(errors) > 1
                            else "") + "; no baseline written")
    write_snapshot(head, output)
    if output != "-":
        click.echo(f"wrote {len(head)} run(s) of {len(dict.fromkeys(models))} model(s) on "
                   f"{len(loaded_targets)} target(s) to {term_safe(output)}", err=True)


# --- diff -----------------------------------------------------------------------------

@click.command("diff", short_help="Per-layer diff of two models or snapshots.")
@click.argument("old", metavar="OLD")
@click.argument("new", metavar="NEW")
@analysis_options
@click.option("--limit", default=20, show_default=True, type=click.IntRange(min=0), metavar="N",
              help="Changed layers to list per model x target (0 = all).")
@report_options
def diff_command(old: str, new: str, targets: tuple[str, ...], dims: dict[str, int],
                 precision: str | None, limit: int, **kwargs: Any) -> None:
    """Per-layer diff of OLD and NEW: two .onnx models, two snapshots, or one of each.

    Layers are matched by name, then by (op type, shapes) signature, so an
    exporter that renames every node still gives a meaningful diff. Models need
    --target; snapshots carry their targets. Exits 0 after printing the diff.
    """
    rules = OutputRules(inputs=(old, new, *targets))
    start_reports(report_paths(kwargs), rules)
    loaded_targets = _targets(targets) if targets else []
    new_runs = _side(new, loaded_targets, dims, precision, None)
    shown = _single_model(new_runs)
    old_runs = _side(old, loaded_targets, dims, precision, shown)
    old_runs, new_runs, notes = _pair_up(old_runs, new_runs)
    result = judge(new_runs, old_runs, (), command="diff", today=_day(None), notes=notes)
    written = write_reports(result, report_paths(kwargs), rules)
    to_stdout = any(path == "-" for path in report_paths(kwargs).values())
    click.echo(render_diff(result, limit, written, (old, new)), nl=False, err=to_stdout)


def _is_snapshot(path: str) -> bool:
    if path.endswith(".json"):
        return True
    try:
        with open(path, "rb") as stream:
            return stream.read(64).lstrip().startswith(b"{")
    except OSError:
        return False


def _side(path: str, targets: list[TargetProfile], dims: dict[str, int], precision: str | None,
          shown: str | None) -> list[RunRecord]:
    """Records of one side: read from a snapshot, or analysed from a model."""
    if _is_snapshot(path):
        runs = list(read_snapshot(path))
        if targets:
            names = {t.name for t in targets}
            runs = [r for r in runs if r.target in names]
        return runs
    if not targets:
        raise click.UsageError(f"{path} is a model: give at least one --target to cost it on")
    return analyse(path, targets, dims=dims, precision=precision,
                   shown_path=shown or normalize_model_path(path))


def _single_model(runs: list[RunRecord]) -> str | None:
    models = {r.model for r in runs}
    return models.pop() if len(models) == 1 else None


def _pair_up(old: list[RunRecord], new: list[RunRecord],
             ) -> tuple[list[RunRecord], list[RunRecord], list[str]]:
    """Pair the sides by (model, target); when NEW holds one model that OLD names
    differently (another path), pair it with OLD's only model, or with the one
    model of OLD that has the same file name."""
    notes: list[str] = []
    new_models = sorted({r.model for r in new})
    old_models = sorted({r.model for r in old})
    if len(new_models) == 1 and new_models[0] not in old_models:
        (new_name,) = new_models
        same_file = [m for m in old_models if Path(m).name == Path(new_name).name]
        candidates = old_models if len(old_models) == 1 else same_file
        if len(candidates) == 1:
            old = [_renamed(r, new_name) for r in old if r.model == candidates[0]]
            notes.append(f"comparing {candidates[0]} (old) with {new_name} (new)")
    if not {r.key for r in old} & {r.key for r in new}:
        held = ", ".join(shorten(m, 80) for m in old_models[:5]) or "nothing"
        raise InputError("OLD and NEW share no model x target pair (OLD holds "
                         f"{held}); check the --target names and the model paths")
    return old, new, notes


def _renamed(run: RunRecord, model: str) -> RunRecord:
    return RunRecord(model, run.model_name, run.target, run.precision, run.metrics,
                     run.target_figures, run.layers, run.unmodelled, run.notes)


DIFF_TOTALS = (("latency_s", "latency"), ("energy_j", "energy"), ("macs", "MACs"),
               ("param_bytes", "params"), ("param_dram_bytes", "param DRAM"),
               ("utilization", "utilization"))
DIFF_LAYER_METRICS = (("latency_s", "latency"), ("macs", "MACs"), ("param_bytes", "params"),
                      ("utilization", "util"))


def render_diff(result: GateResult, limit: int, written: Sequence[str] = (),
                sides: tuple[str, str] | None = None) -> str:
    """The diff as text: totals then the most changed layers, per model x target.

    ``sides`` names OLD and NEW as given on the command line, for the first line.
    """
    lines = [f"diff: {term_safe(sides[0])} (old) -> {term_safe(sides[1])} (new)"] if sides else []
    lines += [f"note: {term_safe(n)}" for n in result.notes]
    for entry in result.entries:
        lines.append(f"{term_safe(entry.model)} on {term_safe(entry.target)}:")
        if entry.diff is None:
            lines.append("  only in " + ("NEW" if entry.base is None else "OLD"))
            continue
        for metric, label in DIFF_TOTALS:
            if metric in entry.diff.totals:
                base, head = entry.diff.totals[metric]
                lines.append(f"  {label:<12} {fmt_metric(metric, base):>12} -> "
                             f"{fmt_metric(metric, head):>12}  {fmt_change(metric, base, head)}")
        ranked = ranked_changes(entry.diff)
        shown = ranked if limit == 0 else ranked[:limit]
        counts = {s: sum(1 for c in entry.diff.layers if c.status == s)
                  for s in ("added", "removed", "changed", "unchanged")}
        lines.append("  layers: " + ", ".join(f"{n} {s}" for s, n in counts.items()))
        for change in shown:
            lines.append("    " + _change_line(change))
        if len(ranked) > len(shown):
            lines.append(f"    ... {len(ranked) - len(shown)} more (use --limit 0 for all)")
    files = [w for w in written if w != "-"]
    if files:
        lines.append(terminal.reports_line(files))
    return "\n".join(lines) + "\n"


def _change_line(change: Any) -> str:
    name = change.head_name if change.head_name is not None else change.base_name
    label = term_safe(shorten(name or "", 80))
    if change.status == "changed" and change.base_name != change.head_name:
        label += f" (was {term_safe(shorten(change.base_name or '', 60))})"
    named = [(metric, text) for metric, text in DIFF_LAYER_METRICS if metric in change.deltas]
    if not named:  # moved only in figures not listed above (e.g. activation bytes): say which
        named = [(metric, metric) for metric in sorted(change.deltas)[:2]]
    parts = []
    for metric, text in named:
        base, head = change.deltas[metric]
        parts.append(f"{text} {fmt_metric(metric, base)} -> {fmt_metric(metric, head)} "
                     f"({fmt_change(metric, base, head)})")
    return f"{change.status:<8} {term_safe(change.op_type)} {label}  {'; '.join(parts)}".rstrip()
