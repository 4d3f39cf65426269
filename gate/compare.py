"""What ``roofgate diff`` compares: two sides, each a snapshot or a model, paired by model x target.

A side is read from a snapshot (its records as stored, optionally narrowed to
the given targets) or analysed from a model file through ``gate.jobs``. When
NEW holds one model that OLD names differently (another path), it is paired
with OLD's only model, or with the one model of OLD that has the same file name.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

from gate.errors import InputError
from gate.globs import normalize_path
from gate.jobs import analyse
from gate.records import RunRecord
from gate.report.text import shorten
from gate.snapshot import read_snapshot
from gate.targets.spec import TargetProfile


def is_snapshot(path: str) -> bool:
    """Whether ``path`` holds a snapshot (JSON) rather than a model."""
    if path.endswith(".json"):
        return True
    try:
        with open(path, "rb") as stream:
            return stream.read(64).lstrip().startswith(b"{")
    except OSError:
        return False


def read_side(path: str, targets: Sequence[TargetProfile], dims: Mapping[str, int],
              precision: str | None, shown: str | None,
              shapes: Mapping[str, tuple[int, ...]] | None = None) -> list[RunRecord]:
    """Records of one side: read from a snapshot, or analysed from a model."""
    if is_snapshot(path):
        runs = list(read_snapshot(path))
        if targets:
            names = {t.name for t in targets}
            runs = [r for r in runs if r.target in names]
        return runs
    if not targets:
        raise InputError(f"{path} is a model: give at least one --target to cost it on (or add "
                         "'targets:' to roofgate.yaml)")
    return analyse(path, targets, dims=dims, precision=precision,
                   shown_path=shown or normalize_path(path), shapes=shapes)


def single_model(runs: list[RunRecord]) -> str | None:
    models = {r.model for r in runs}
    return models.pop() if len(models) == 1 else None


def pair_sides(old: list[RunRecord], new: list[RunRecord],
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


