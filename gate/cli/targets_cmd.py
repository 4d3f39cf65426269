"""``roofgate targets``: list the built-in targets (and given files) with key figures; show one.

The listing computes nothing the cost model does not: peaks and ridge points
come from ``TargetProfile`` methods, so the figures match what reports show.
"""

from __future__ import annotations

import click

from gate import metrics, units
from gate.targets import builtin_target_names, builtin_target_yaml, load_target
from gate.targets.spec import TargetProfile


def register(cli: click.Group) -> None:
    """Add the ``targets`` command group to ``cli``."""
    cli.add_command(targets)


@click.group(invoke_without_command=True,
             short_help="List the built-in targets; show one as YAML.")
@click.option("--file", "files", multiple=True, metavar="PATH",
              help="Also list this target YAML file (repeatable).")
@click.pass_context
def targets(ctx: click.Context, files: tuple[str, ...]) -> None:
    """List the built-in targets with their key figures.

    Add your own target as a YAML file (schema in docs/targets.md; start from
    `roofgate targets show NAME`, a commented example) and pass its path
    wherever a target name is accepted.
    """
    if ctx.invoked_subcommand is not None:
        return
    profiles = [load_target(name) for name in builtin_target_names()]
    profiles += [load_target(path) for path in files]
    for line in target_table(profiles):
        click.echo(line)


@targets.command("show")
@click.argument("name")
def show(name: str) -> None:
    """Print a target's YAML (a built-in name or a file path), checked first."""
    target = load_target(name)  # validates: a broken file is reported, not printed
    if target.source == "builtin":
        click.echo(builtin_target_yaml(name), nl=False)
    else:
        with open(target.source, encoding="utf-8") as handle:
            click.echo(handle.read(), nl=False)


_HEADERS = ("target", "dataflow", "PEs", "clock", "peak", "precisions", "buffers", "DRAM",
            "ridge", "static")


def target_table(profiles: list[TargetProfile]) -> list[str]:
    """Aligned text lines: one row of key figures per target, then each description.

    Peak and ridge point are at the target's first declared precision.
    """
    rows = [_HEADERS] + [_row(profile) for profile in profiles]
    widths = [max(len(row[i]) for row in rows) for i in range(len(_HEADERS))]
    lines = ["  ".join(cell.ljust(width) for cell, width in zip(row, widths)).rstrip()
             for row in rows]
    lines.append("")
    lines += [f"{profile.name}: {profile.description}"
              + ("" if profile.source == "builtin" else f" [{profile.source}]")
              for profile in profiles]
    return lines


def _row(profile: TargetProfile) -> tuple[str, ...]:
    first = next(iter(profile.precisions), None)
    peak = f"{units.fmt_count(profile.peak_flops_per_s(first), 'FLOP/s')} {first}" if first else "-"
    ridge = metrics.fmt("ridge_flop_per_byte", profile.ridge_flop_per_byte(first)) if first else "-"
    if profile.is_unified:
        buffers = f"{units.fmt_bytes(profile.unified_buffer_bytes)} unified"
    else:
        buffers = (f"{units.fmt_bytes(profile.param_buffer_bytes)} param + "
                   f"{units.fmt_bytes(profile.activation_buffer_bytes)} act")
    return (profile.name, profile.dataflow, f"{profile.pe_rows}x{profile.pe_cols}",
            units.fmt_count(profile.clock_hz, "Hz"), peak, ",".join(profile.precisions), buffers,
            units.fmt_count(profile.dram_bytes_per_s, "B/s"),
            ridge, units.fmt_count(profile.static_power_w, "W"))
