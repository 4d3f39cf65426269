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


def _loaded_after(args: list[str], cwd: Path = ROOT) -> set[str]:
    done = subprocess.run([sys.executable, "-c", _PROBE, json.dumps(args)], cwd=cwd,
                          capture_output=True, text=True, check=True,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    line = next(x for x in done.stdout.splitlines() if x.startswith("MODULES "))
    return set(json.loads(line[len("MODULES "):]))


@pytest.mark.parametrize("args", [["--help"], ["--version"], ["targets"]])
def test_quick_commands_import_nothing_heavy(args: list[str]) -> None:
    loaded = _loaded_after(args)
    assert not [m for m in HEAVY if m in loaded], args


def _two_models(folder: Path) -> Path:
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    for name, width in (("a", 8), ("b", 16)):
        b = NetBuilder(name)
        b.output(b.gemm(b.input("x", [1, 16]), width, name="fc"))
        save_model(b.build(), folder / "models" / f"{name}.onnx")
    return folder / "models"


def test_the_probe_sees_a_heavy_import(tmp_path: Path) -> None:
    """Negative control: a command that analyses in its own process loads onnx."""
    models = _two_models(tmp_path)
    assert "onnx" in _loaded_after(["profile", str(models / "a.onnx")])
    assert "onnx" in _loaded_after(["audit", "-j", "1", "-t", "ws-64x64-4mib", "-p",
                                    "default", str(models)], cwd=tmp_path)


def test_a_parallel_runs_parent_never_imports_the_analysis_stack(tmp_path: Path) -> None:
    """Under -j 2 the workers import onnx and numpy, each side by side with the parent's
    config reading and model search; the parent, which judges and writes reports, never
    does (it paid about 0.13 s for it alone, before forking the workers)."""
    models = _two_models(tmp_path)
    loaded = _loaded_after(["audit", "-j", "2", "-t", "ws-64x64-4mib", "-p", "default",
                            str(models), "--json", "out.json"], cwd=tmp_path)
    assert not [m for m in HEAVY if m in loaded and m != "junit_xml"]
    entries = json.loads((tmp_path / "out.json").read_text())["result"]["entries"]
    assert len(entries) == 2  # and both models were analysed (by the workers)


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
