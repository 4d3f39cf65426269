"""The quick commands stay quick: ``--help``, ``--version`` and ``targets`` load no heavy module.

Checked by what a fresh interpreter has imported afterwards, not by a stopwatch (the
suite has no timed tests; bench/run.py times them).
"""

from __future__ import annotations

import importlib
import json
import subprocess
import sys
from pathlib import Path

import pytest

from gate.cli import _COMMANDS, cli

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("onnx", "numpy", "matplotlib", "junit_xml", "gate.costmodel", "gate.profile")

_PROBE = """
import json, sys
from gate.cli import main
sys.argv = ["roofgate", *json.loads(sys.argv[1])]
try:
    main()
except SystemExit:
    pass
print("\\nMODULES " + json.dumps(sorted(sys.modules)))
"""


def _loaded_after(args: list[str]) -> set[str]:
    done = subprocess.run([sys.executable, "-c", _PROBE, json.dumps(args)], cwd=ROOT,
                          capture_output=True, text=True, check=True,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    line = next(x for x in done.stdout.splitlines() if x.startswith("MODULES "))
    return set(json.loads(line[len("MODULES "):]))


@pytest.mark.parametrize("args", [["--help"], ["--version"], ["targets"]])
def test_quick_commands_import_nothing_heavy(args: list[str]) -> None:
    loaded = _loaded_after(args)
    assert not [m for m in HEAVY if m in loaded], args


def test_the_probe_sees_a_heavy_import() -> None:
    """Negative control: a command that needs onnx does load it."""
    assert "onnx" in _loaded_after(["diff", "/nonexistent-a.onnx", "/nonexistent-b.onnx"])


def test_listed_help_is_each_commands_own() -> None:
    """The lazy table's one-line help is the command's ``short_help`` (no second wording)."""
    for name, (module, attribute, short_help) in _COMMANDS.items():
        command = getattr(importlib.import_module(module), attribute)
        assert command.name == name
        assert command.short_help == short_help


def test_every_command_resolves() -> None:
    import click

    ctx = click.Context(cli)
    for name in cli.list_commands(ctx):
        assert cli.get_command(ctx, name) is not None


def test_builtin_placements_are_onnx_op_types() -> None:
    """Built-in targets skip the op-type check at load time (speed); this checks them against
    the ONNX operator set instead (onnx.defs, the ONNX operator specification)."""
    import onnx.defs

    from gate.targets import builtin_target_names, load_target
    from gate.targets.spec import CONV_KINDS

    known = {schema.name for schema in onnx.defs.get_all_schemas_with_history()}
    known |= set(CONV_KINDS.values())  # roofgate's own kinds of convolution (depthwise-conv)
    for name in builtin_target_names():
        for op_type in load_target(name).placement:
            assert ":" in op_type or op_type in known, (name, op_type)
