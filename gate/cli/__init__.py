"""The ``roofgate`` command line: one group, one module per command family.

Every exception that is not a user-facing ``RoofgateError`` is turned into an
internal error (exit 3) here, so a crash never exits 0 (pass) or 1 (findings).
"""

from __future__ import annotations

import importlib
import sys
import traceback

import click

from gate import __version__
from gate.errors import InternalError

# Modules that each add their commands to ``cli`` through ``register(cli)``.
_COMMAND_MODULES = (
    "gate.cli.profile_cmd",
    "gate.cli.targets_cmd",
    "gate.cli.files_cmd",
    "gate.cli.ci_cmd",
    "gate.cli.init_cmd",
)

# ``--help`` lists commands in the order of the workflow, not alphabetically: the CI
# commands first, then the ones on files given by name, then the helpers. A command
# missing here is listed after these, alphabetically.
COMMAND_ORDER = ("check", "audit", "merge", "evaluate", "profile", "diff", "baseline",
                 "targets", "init", "demo")


class _FailClosedGroup(click.Group):
    def list_commands(self, ctx: click.Context) -> list[str]:
        """Commands in workflow order (``COMMAND_ORDER``), the rest after them."""
        names = super().list_commands(ctx)
        rank = {name: k for k, name in enumerate(COMMAND_ORDER)}
        return sorted(names, key=lambda name: (rank.get(name, len(rank)), name))

    def invoke(self, ctx: click.Context) -> object:
        try:
            return super().invoke(ctx)
        except InternalError as exc:
            if ctx.params.get("debug"):
                _print_traceback(exc.__cause__ or exc)
            raise
        except (click.ClickException, click.exceptions.Exit, click.Abort, KeyboardInterrupt):
            raise
        except Exception as exc:  # the fail-closed boundary: map every crash
            if ctx.params.get("debug"):
                _print_traceback(exc)
            detail = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
            raise InternalError(
                f"internal error ({detail}); rerun with --debug and report the traceback"
            ) from exc


def _print_traceback(exc: BaseException) -> None:
    """Under --debug: the full traceback on stderr; the exit code stays 3 (never 1 or 0)."""
    traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)


@click.group(cls=_FailClosedGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.option("--debug", is_flag=True, help="Show tracebacks for internal errors.")
@click.version_option(__version__, prog_name="roofgate")
def cli(debug: bool) -> None:
    """Analytical pre-merge gate for ONNX models on edge accelerator targets.

    Estimates are analytical, not device measurements: confirm on device before release.
    """


def _register_commands() -> None:
    for name in _COMMAND_MODULES:
        importlib.import_module(name).register(cli)


_register_commands()


def main() -> None:
    """Console-script entry point."""
    sys.exit(cli.main(prog_name="roofgate"))
