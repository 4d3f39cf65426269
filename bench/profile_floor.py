"""`roofgate profile` end to end against the floor, whole processes in turns.

The floor is a fresh interpreter doing ``onnx.load`` + ``onnx.shape_inference.infer_shapes``
on the same file. Each run starts one candidate and one floor process (the order
alternates), and records wall seconds, CPU seconds (user + system: steadier than wall
time on a busy machine) and peak resident memory (``ru_maxrss`` of the child); the
ratios are medians of the per-pair ratios. ``--baseline PATH`` adds a third process per
run, ``profile`` from another source tree (an earlier commit checked out or exported
there), so before and after are measured in the same turns. Usage:

    python3 bench/profile_floor.py MODEL.onnx [MODEL.onnx ...] [--runs 5] [--format json]
        [--checkout PATH] [--baseline PATH]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent.parent
TARGET = "ws-64x64-4mib"
EMPTY = tempfile.mkdtemp(prefix="roofgate-bench-")
FLOOR = ("import sys, onnx, onnx.shape_inference; "
         "onnx.shape_inference.infer_shapes(onnx.load(sys.argv[1]))")


def run_once(argv: list[str], checkout: str) -> tuple[float, float, float]:
    """Wall seconds, CPU seconds and peak RSS (MiB) of one whole process."""
    env = {**os.environ, "PYTHONPATH": checkout}
    start = time.perf_counter()
    # cwd: an empty folder, so `-c` imports gate from PYTHONPATH, not from where we stand
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env,
                            cwd=EMPTY)
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - start
    stderr = proc.stderr.read().decode() if proc.stderr else ""
    if os.waitstatus_to_exitcode(status) not in (0, 1):
        raise SystemExit(f"{argv}: exit {os.waitstatus_to_exitcode(status)}\n{stderr}")
    return seconds, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("models", nargs="+")
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--format", default="table")
    parser.add_argument("--checkout", default=str(HERE),
                        help="the roofgate source tree to run (default: this one)")
    parser.add_argument("--baseline", default="",
                        help="another roofgate source tree, run in the same turns (before/after)")
    args = parser.parse_args()
    for model in args.models:
        _measure(str(Path(model).resolve()), args)


def _measure(path: str, args: argparse.Namespace) -> None:
    """One model: every run starts each process once, in a rotating order."""
    candidate = [sys.executable, "-c", "from gate.cli import main; main()", "profile",
                 path, "-t", TARGET, "--format", args.format]
    sides = {"profile": (candidate, args.checkout)}
    if args.baseline:
        sides["baseline"] = (list(candidate), args.baseline)
    sides["floor"] = ([sys.executable, "-c", FLOOR, path], args.checkout)
    measured: dict[str, list[tuple[float, float, float]]] = {name: [] for name in sides}
    for run in range(args.runs):
        names = list(sides)
        for name in names[run % len(names):] + names[:run % len(names)]:
            argv, checkout = sides[name]
            measured[name].append(run_once(argv, checkout))
    print(f"{Path(path).name} ({args.format}, {args.runs} runs, load "
          f"{os.getloadavg()[0]:.2f})")
    floor = measured["floor"]
    for name, rows in measured.items():
        wall, cpu, mib = (statistics.median(row[k] for row in rows) for k in range(3))
        line = f"  {name:8s} {wall:6.2f} s ({cpu:.2f} s CPU) {mib:5.0f} MiB"
        if name != "floor":
            ratios = [statistics.median(a[k] / b[k] for a, b in zip(rows, floor))
                      for k in range(3)]
            line += (f"   vs floor: time {ratios[0]:.2f}x, CPU {ratios[1]:.2f}x, "
                     f"peak memory {ratios[2]:.2f}x")
        print(line)


if __name__ == "__main__":
    main()
