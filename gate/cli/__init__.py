"""The ``roofgate`` command line: one group, one module per command family.

Commands are registered lazily: ``_COMMANDS`` names the module and function of
each with its one-line help, and a module is imported only when its command
runs, so ``roofgate --help``, ``--version`` and ``targets`` never import onnx or
numpy (tests/test_report_cli_speed.py checks which modules they load).

Every exception that is not a user-facing ``RoofgateError`` is turned into an
internal error (exit 3) here, so a crash never exits 0 (pass) or 1 (findings).
"""

from __future__ import annotations

import errno
import importlib
import os
import signal
import sys
import traceback

import click

try:  # POSIX: the access mode of the standard descriptors
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

from gate import __version__
from gate.errors import InputError, InternalError

EXIT_INTERRUPTED = 130  # 128 + SIGINT (2), the shell's code for a run ended by Ctrl-C
# Errors of writing to standard output: a full device, a closed pipe, a file size limit.
_OUTPUT_ERRNOS = frozenset({errno.ENOSPC, errno.EPIPE, errno.EDQUOT, errno.EFBIG, errno.EIO})

# Command name -> (module, attribute, the one line --help lists; the command's own
# ``short_help``, kept equal by tests/test_report_cli_lazy.py).
_COMMANDS: dict[str, tuple[str, str, str]] = {
    "check": ("gate.cli.ci_cmd", "check_command",
              "Gate the models a branch changed (both sides from git)."),
    "audit": ("gate.cli.ci_cmd", "audit_command",
              "Profile and judge a whole model zoo, optionally sharded."),
    "merge": ("gate.cli.ci_cmd", "merge_command",
              "Combine `audit --shard` results into one set of reports."),
    "evaluate": ("gate.cli.files_cmd", "evaluate_command",
                 "Judge model files given by name (no git needed)."),
    "profile": ("gate.cli.profile_cmd", "profile", "Per-layer counts and costs of one model."),
    "diff": ("gate.cli.files_cmd", "diff_command", "Per-layer diff of two models or snapshots."),
    "baseline": ("gate.cli.files_cmd", "baseline_command",
                 "Write a baseline snapshot for later comparisons."),
    "targets": ("gate.cli.targets_cmd", "targets",
                "List the built-in targets; show one as YAML."),
    "init": ("gate.cli.init_cmd", "init_command",
             "Write roofgate.yaml and a starter policy for this repository."),
    "demo": ("gate.cli.ci_cmd", "demo_command",
             "Run the gate on a fictional repository, built on the fly."),
}

# ``--help`` lists commands in the order of the workflow, not alphabetically: the CI
# commands first, then the ones on files given by name, then the helpers. A command
# missing here is listed after these, alphabetically.
COMMAND_ORDER = ("check", "audit", "merge", "evaluate", "profile", "diff", "baseline",
                 "targets", "init", "demo")


class _LazyGroup(click.Group):
    """A group whose commands are imported on first use; --help lists them from the table,
    in workflow order (``COMMAND_ORDER``), the rest after them."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        names = set(_COMMANDS) | set(self.commands)
        rank = {name: k for k, name in enumerate(COMMAND_ORDER)}
        return sorted(names, key=lambda name: (rank.get(name, len(rank)), name))

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in self.commands or cmd_name not in _COMMANDS:
            return self.commands.get(cmd_name)
        module, attribute, _ = _COMMANDS[cmd_name]
        command = getattr(importlib.import_module(module), attribute)
        self.add_command(command, cmd_name)
        return command  # type: ignore[no-any-return]

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        """The command list from the table, without importing any command module."""
        rows = [(name, _COMMANDS[name][2] if name in _COMMANDS
                 else self.commands[name].get_short_help_str())
                for name in self.list_commands(ctx)]
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)


class _FailClosedGroup(_LazyGroup):
    def invoke(self, ctx: click.Context) -> object:
        try:
            return super().invoke(ctx)
        except InternalError as exc:
            if ctx.params.get("debug"):
                _print_traceback(exc.__cause__ or exc)
            raise
        except (click.ClickException, click.exceptions.Exit, click.Abort):
            raise
        except KeyboardInterrupt:  # Ctrl-C: the shell's 128 + SIGINT, never 1 ("a rule failed")
            click.echo("roofgate: interrupted; no reports were written", err=True)
            raise click.exceptions.Exit(EXIT_INTERRUPTED) from None
        except OSError as exc:
            if exc.errno not in _OUTPUT_ERRNOS:
                raise _internal(ctx, exc) from exc
            raise InputError(f"cannot write ({exc.strerror}); check the free space, and the "
                             "device or pipe standard output goes to") from None
        except Exception as exc:  # the fail-closed boundary: map every crash
            raise _internal(ctx, exc) from exc


def _internal(ctx: click.Context, exc: BaseException) -> InternalError:
    """The one-line internal error (exit 3) for a crash; its traceback under --debug."""
    if ctx.params.get("debug"):
        _print_traceback(exc)
    detail = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
    return InternalError(f"internal error ({detail}); rerun with --debug and report the traceback")


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



def main() -> None:
    """Console-script entry point; SIGTERM ends the run (and its worker processes) cleanly."""
    _refuse_closed_stdout(_occupy_closed_standard_fds())
    signal.signal(signal.SIGTERM, _terminated)
    code: object
    try:
        code = cli.main(prog_name="roofgate")
    except SystemExit as exc:
        code = exc.code
    _flush_or_drop_stdout()
    sys.exit(code)


def _occupy_closed_standard_fds() -> set[int]:
    """Point each closed standard descriptor (``2>&-``, a launcher that closed them) at
    /dev/null and return the closed ones.

    Left closed, the first file the run opens would take its number (git's error
    messages, fd 2 of the processes started here, would land in it), and the first
    progress line crashed a passing run: into exit 3 when Python left None in
    ``sys.stderr``, into exit 1 ("a rule failed") with no message at all when a wrapper
    left a file open there read-only (a pyenv shim does). With stderr closed, messages
    are dropped; the exit code still carries the verdict.
    """
    closed = {fd for fd in (0, 1, 2) if not _usable(fd)}
    for fd in sorted(closed):
        devnull = os.open(os.devnull, os.O_RDWR)
        if devnull != fd:
            os.dup2(devnull, fd)
            os.close(devnull)
    if 1 in closed and sys.stdout is None:
        sys.stdout = open(1, "w", encoding="utf-8", closefd=False)  # noqa: SIM115
    if 2 in closed and sys.stderr is None:
        sys.stderr = open(2, "w", encoding="utf-8", closefd=False)  # noqa: SIM115
    return closed


def _usable(fd: int) -> bool:
    """Whether ``fd`` is open, and for stdout and stderr open for writing (a closed one
    may hold a file the launcher opened since: a shell reading a wrapper script)."""
    try:
        if fcntl is None:
            os.fstat(fd)
            return True
        flags = fcntl.fcntl(fd, fcntl.F_GETFL)
    except OSError:
        return False
    return fd == 0 or flags & os.O_ACCMODE != os.O_RDONLY


def _refuse_closed_stdout(closed: set[int]) -> None:
    """Exit 2 when stdout was closed: the summary (or a report sent to '-') has nowhere to
    go, as a full or broken stdout is exit 2."""
    if 1 in closed:
        click.echo("Error: standard output is closed (>&-); leave it open, or send it to "
                   "/dev/null to discard the summary", err=True)
        sys.exit(InputError.exit_code)


def _flush_or_drop_stdout() -> None:
    """Flush stdout now; if it cannot take more (full device, closed pipe), point it at
    /dev/null so the interpreter's own flush at exit cannot change the exit code (the
    error line was already printed on stderr)."""
    try:
        sys.stdout.flush()
    except OSError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)


def _terminated(signum: int, frame: object) -> None:
    """SIGTERM: unwind like Ctrl-C (partial files removed, worker processes terminated),
    exit 128 + 15. Worker processes inherit this handler, so they exit the same way."""
    raise SystemExit(128 + signum)
