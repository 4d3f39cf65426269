"""``roofgate check``, ``audit``, ``merge`` and ``demo``: the gate as CI runs it.

``check`` compares the models changed on a branch with the merge base (both
sides read from git, no stored baseline needed); ``audit`` profiles a whole
model zoo in parallel, optionally as one shard of a CI matrix; ``merge``
combines shard results into the reports an unsharded audit writes; ``demo``
shows all of it on a fictional repository built in a temporary folder.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any

import click

from gate.cli.common import (
    chosen_reports,
    config_option,
    dim_option,
    finish,
    load_project,
    output_rules,
    precision_option,
    shape_option,
    start_reports,
    target_option,
)
from gate.config import ProjectConfig
from gate.errors import RoofgateError
from gate.outfile import TYPED_PATHS, OutputRules
from gate.report import report_options, report_paths
from gate.result import GateResult


def register(cli: click.Group) -> None:
    cli.add_command(check_command)
    cli.add_command(audit_command)
    cli.add_command(merge_command)
    cli.add_command(demo_command)


def _config_options(func: Any) -> Any:
    """The project-config options of ``check`` and ``audit`` (report options come apart)."""
    for option in reversed((
        config_option(),
        target_option("Target profile for every model: a built-in name or a YAML file "
                      "(repeatable; replaces the config's targets)."),
        click.option("--policy", "-p", "policies", multiple=True, metavar="NAME|FILE",
                     help="Policy for every model: a built-in name (default, strict, nightly) "
                          "or a YAML file (repeatable; replaces the config's policies)."),
        dim_option("Bind a symbolic input dim, e.g. --dim seq=256 (repeatable; merged over "
                   "the config's dims)."),
        shape_option("Bind every dim of a graph input, e.g. --shape images=1x3x640x640 "
                     "(repeatable; merged over the config's shapes)."),
        precision_option("Count floating-point tensors' bytes at this deploy precision "
                         "(int8, fp16, ...; replaces the config's)."),
        click.option("--baseline", default=None, metavar="SNAPSHOT",
                     help="Baseline snapshot (from `roofgate baseline` or `audit --snapshot`) "
                          "to compare against instead of the base side from git (check) or "
                          "nothing (audit)."),
        click.option("-j", "--jobs", default=1, show_default=True, metavar="N",
                     type=click.IntRange(min=0), help="Parallel processes for the analysis; above 1 the report "
                          "files are also rendered side by side (0 = one per CPU)."),
    )):
        func = option(func)
    return func


# --- check ----------------------------------------------------------------------------

@click.command("check", short_help="Gate the models a branch changed (both sides from git).")
@click.option("--base", "base_ref", required=True, metavar="REF",
              help="Branch or commit the pull request targets (e.g. origin/main).")
@click.option("--staged", is_flag=True,
              help="Judge the staged models (the index) instead of HEAD: the pre-commit hook.")
@_config_options
@report_options
def check_command(base_ref: str, staged: bool, **kwargs: Any) -> None:
    """Gate the ONNX models changed between the merge base of REF and HEAD.

    Both sides are read from git (renames followed; Git LFS files smudged), so
    no stored baseline is needed; --baseline uses a snapshot for the base side.
    Exit 0 pass, 1 a rule failed, 2 bad input or an unanalysable model.
    """
    from gate.ci import run_check
    from gate.forked import default_processes
    from gate.gitscan import merge_base, repo_root
    from gate.jobs import workers_started
    from gate.judge import utc_today
    from gate.rules_source import check_rules

    root = repo_root(Path.cwd())
    _remove_stale_reports(kwargs, root)
    today = utc_today()
    base_commit = merge_base(base_ref, root)
    workers = default_processes(kwargs["jobs"])
    with workers_started(workers), \
            check_rules(root, base_commit, _config_loader(kwargs),
                        config_path=kwargs["config_path"], baseline=kwargs["baseline"]) as chosen:
        config = chosen.config
        paths = chosen_reports(kwargs, config)
        rules = output_rules(kwargs, config, root, chosen.repo_files)
        start_reports(paths, rules)
        result, title = run_check(root, config, base_ref, baseline=chosen.baseline,
                                  workers=workers, today=today, staged=staged)
        result = replace(result, rules_source=chosen.source,
                         policies=tuple(chosen.repo_name(p) for p in result.policies))
        finish(result, paths, title, rules=rules, processes=workers)


def _config_loader(kwargs: dict[str, Any]) -> Callable[[Path | None, bool], ProjectConfig]:
    """Load a config file (None: the working tree's, as every other command), with or
    without the command-line flags applied."""
    def load(path: Path | None, flags: bool) -> ProjectConfig:
        given = dict(kwargs) if flags else {}
        if path is not None:
            given["config_path"] = str(path)
        return load_project(given, root=Path.cwd(), require_targets=flags)
    return load


def _remove_stale_reports(kwargs: dict[str, Any], root: Path) -> None:
    """The reports of an earlier run, at the paths the working tree's config names, go first,
    so no early exit (a bad ref, a broken base config) leaves an old PASS behind. A config
    or path the working tree gets wrong is left to the checks that follow."""
    try:
        config = load_project(kwargs, root=Path.cwd())
        start_reports(chosen_reports(kwargs, config), output_rules(kwargs, config, root))
    except RoofgateError:
        pass


# --- audit ----------------------------------------------------------------------------

@click.command("audit", short_help="Profile and judge a whole model zoo, optionally sharded.")
@click.argument("paths", nargs=-1, type=click.Path(path_type=str))
@_config_options
@click.option("--shard", default=None, metavar="I/N",
              help="Analyse only shard I of N (sorted round-robin); write --shard-out.")
@click.option("--shard-out", default=None, metavar="FILE",
              help="Where a shard writes its result (default roofgate-out/shard-I-of-N.json).")
@click.option("--snapshot", default=None, metavar="FILE",
              help="Write a baseline snapshot of this audit (for the next night's trend).")
@report_options
def audit_command(paths: tuple[str, ...], shard: str | None, shard_out: str | None,
                  snapshot: str | None, **kwargs: Any) -> None:
    """Profile a whole model zoo (PATHS: files or folders; default: the config's models).

    Progress goes to stderr: a bar on a terminal, plain lines otherwise.
    --baseline (the previous nightly snapshot) adds the trend: which models
    got better or worse.
    """
    from gate.ci import run_audit
    from gate.forked import default_processes
    from gate.jobs import workers_started
    from gate.shards import parse_shard, shard_share, write_shard

    workers = default_processes(kwargs["jobs"])
    with workers_started(workers):  # they import the analysis stack while the zoo is found
        config = load_project(kwargs, require_targets=True)
        root = Path(config.root) if config.source else Path.cwd()
        rules = output_rules(kwargs, config, Path.cwd())
        start_reports(chosen_reports(kwargs, config) if shard is None else report_paths(kwargs),
                      rules)
        shard_ij = parse_shard(shard) if shard else None
        result, models = run_audit(root, config, paths, baseline=kwargs["baseline"],
                                   workers=workers, shard=shard_ij)
    if shard_ij is not None:
        index, count = shard_ij
        out = shard_out or f"roofgate-out/shard-{index}-of-{count}.json"
        write_shard(out, result, index, count, models)
        # A shard writes only its shard file unless report flags ask for partial reports.
        _finish_audit(result, report_paths(kwargs), f"roofgate audit shard {index}/{count}: "
                      f"{len(shard_share(models, index, count))} of {len(models)} models",
                      None, (out,), rules, workers)
    _finish_audit(result, chosen_reports(kwargs, config), f"roofgate audit: {len(models)} models",
                  snapshot, rules=rules, processes=workers)


def _finish_audit(result: GateResult, paths: dict[str, str | None], title: str,
                  snapshot: str | None, written: tuple[str, ...] = (),
                  rules: OutputRules = TYPED_PATHS, processes: int = 1) -> None:
    """Add the trend notes, write the snapshot if asked, then the reports and the summary."""
    from gate.judge import with_notes
    from gate.trend import trend_notes

    result = with_notes(result, trend_notes(result))
    if snapshot:
        from gate.snapshot import write_snapshot

        write_snapshot([e.head for e in result.entries if e.head is not None], snapshot)
        written += (snapshot,)
    finish(result, paths, title, written, rules, processes)


# --- merge ----------------------------------------------------------------------------

@click.command("merge", short_help="Combine `audit --shard` results into one set of reports.")
@click.argument("shard_files", nargs=-1, required=True, type=click.Path(path_type=str))
@config_option("Project config, for its report paths (default: the roofgate.yaml in the "
               "current folder or the nearest one above it).")
@click.option("--snapshot", default=None, metavar="FILE",
              help="Write a baseline snapshot of the merged audit.")
@click.option("-j", "--jobs", default=1, show_default=True, metavar="N",
              type=click.IntRange(min=0),
              help="Processes to render the report files side by side (0 = one per CPU).")
@report_options
def merge_command(shard_files: tuple[str, ...], config_path: str | None,
                  snapshot: str | None, jobs: int, **kwargs: Any) -> None:
    """Combine `audit --shard` results into the reports an unsharded audit writes.

    Refuses a missing or duplicated shard, or shards from different roofgate
    versions or checkouts.
    """
    from gate.forked import default_processes
    from gate.shards import read_shards

    config = load_project({"config_path": config_path})
    paths = chosen_reports(kwargs, config)
    rules = output_rules({**kwargs, "baseline": None}, config, Path.cwd(), shard_files)
    start_reports(paths, rules)
    result = read_shards(list(shard_files))
    models = len({e.model for e in result.entries} | {e.model for e in result.errors})
    _finish_audit(result, paths, f"roofgate audit (merged {len(shard_files)} "
                  f"shards): {models} models", snapshot, rules=rules,
                  processes=default_processes(jobs))


# --- demo -----------------------------------------------------------------------------

@click.command("demo", short_help="Run the gate on a fictional repository, built on the fly.")
@click.option("--keep", "keep_dir", default=None, metavar="DIR",
              help="Build the demo repository in DIR (kept) instead of a temporary folder.")
def demo_command(keep_dir: str | None) -> None:
    """Run the gate on a fictional repository (Fernhollow Field Robotics) built on the fly.

    Commits four models, opens a pull-request-like branch that widens one
    model's last stage (a layer outgrows the parameter buffer) and prunes
    another, and runs `roofgate check`. The gate failing on the widened model
    is the designed outcome: the demo exits 0 when that happens.
    """
    from gate.demo import run_demo

    raise click.exceptions.Exit(run_demo(keep_dir))

