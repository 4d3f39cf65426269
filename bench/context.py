"""What every benchmark case shares: its work folder, its size mode, progress lines."""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass
from pathlib import Path

from inputs import TARGET
from measure import Command, load_average, roofgate

FLOOR_CODE = "import sys, onnx; onnx.shape_inference.infer_shapes(onnx.load(sys.argv[1]))"


@dataclass(frozen=True)
class Context:
    work: Path
    quick: bool
    runs: int | None

    def reps(self, full: int) -> int:
        """Rounds for a case: ``--runs`` if given, one when quick, else ``full``."""
        return self.runs or (1 if self.quick else full)


def progress(message: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')} load {load_average():.1f}] {message}",
          file=sys.stderr, flush=True)


def assert_fully_modelled(path: Path) -> None:
    """A benchmark input the tool cannot fully see would time nothing: refuse it."""
    from gate.jobs import analyse
    from gate.targets import load_target

    (record,) = analyse(str(path), [load_target(TARGET)])
    share = record.metrics["coverage_node_share"]
    if share != 1.0:
        raise SystemExit(f"benchmark input {path} is only {share:.0%} modelled")


def profile_cmd(path: Path, *extra: str) -> Command:
    """``roofgate profile PATH`` on the bench target, the complete per-layer JSON."""
    return roofgate("profile", str(path), "-t", TARGET, "--format", "json", *extra)
