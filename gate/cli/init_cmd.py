"""``roofgate init``: options only; gate.scaffold looks at the repository and writes the files."""

from __future__ import annotations

from pathlib import Path

import click

from gate.cli.common import dim_option, target_option


def register(cli: click.Group) -> None:
    """Add the ``init`` command to ``cli``."""
    cli.add_command(init_command)


@click.command("init", short_help="Write roofgate.yaml and a starter policy for this repository.")
@target_option("Target for every model: a built-in name or a YAML file (repeatable; default: "
               "the fictional example ws-64x64-4mib, to replace).")
@dim_option("Value for a symbolic input dim the models leave unbound, e.g. --dim seq=256 "
            "(repeatable; batch-like dims default to 1).")
@click.option("--workflows", is_flag=True,
              help="Also write the GitHub workflows (pull request, comment, nightly).")
@click.option("--force", is_flag=True, help="Overwrite files that already exist.")
def init_command(targets: tuple[str, ...], dims: dict[str, int], workflows: bool,
                 force: bool) -> None:
    """Set up roofgate in the current git repository.

    Finds the .onnx files (and Git LFS pointers), proposes one model group per
    folder, binds the input dims it can see, and writes roofgate.yaml and
    policies/roofgate.yaml (with --workflows also .github/workflows/roofgate-*.yml).
    Refuses to overwrite files without --force. Then runs the gate once on every
    model it could read and says what to commit. Exit code: that run's.
    """
    from gate import scaffold
    from gate.gitscan import repo_root
    from gate.report import terminal

    root = repo_root(Path.cwd())
    plan = scaffold.make_plan(root, targets, dims, workflows)
    written = scaffold.write_plan(root, plan, force)
    result = scaffold.first_run(root, plan)
    if result is not None:
        click.echo(terminal.render(result, (), "roofgate init: the gate once on every model "
                                   "it could read"), nl=False)
    for line in scaffold.explain(plan, written, workflows):
        click.echo(line)
    raise click.exceptions.Exit(result.exit_code if result is not None else 0)
