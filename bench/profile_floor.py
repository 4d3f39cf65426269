"""`roofgate profile` end to end against the floor, whole processes in turns.

The floor is a fresh interpreter doing ``onnx.load`` + ``onnx.shape_inference.infer_shapes``
on the same file. Each run starts one candidate and one floor process (the order
alternates), and records wall seconds, CPU seconds (user + system: steadier than wall
time on a busy machine) and peak resident memory (``ru_maxrss`` of the child); the
ratios are medians of the per-pair ratios. Usage:

    python3 bench/profile_floor.py MODEL.onnx [MODEL.onnx ...] [--runs 5] [--format json]
        [--checkout PATH]
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
    args = parser.parse_args()
    for model in args.models:
        path = str(Path(model).resolve())
        candidate = [sys.executable, "-c", "from gate.cli import main; main()", "profile",
                     path, "-t", TARGET, "--format", args.format]
        floor = [sys.executable, "-c", FLOOR, path]
        time_ratios, cpu_ratios, mem_ratios, rows = [], [], [], []
        for run in range(args.runs):
            order = (candidate, floor) if run % 2 == 0 else (floor, candidate)
            measured = {id(argv): run_once(argv, args.checkout) for argv in order}
            cand_s, cand_cpu, cand_mib = measured[id(candidate)]
            floor_s, floor_cpu, floor_mib = measured[id(floor)]
            time_ratios.append(cand_s / floor_s)
            cpu_ratios.append(cand_cpu / floor_cpu)
            mem_ratios.append(cand_mib / floor_mib)
            rows.append(f"  run {run}: profile {cand_s:.2f} s ({cand_cpu:.2f} s CPU) "
                        f"{cand_mib:.0f} MiB, floor {floor_s:.2f} s ({floor_cpu:.2f} s CPU) "
                        f"{floor_mib:.0f} MiB")
        print(f"{Path(model).name} ({args.format}, {args.runs} pairs, load "
              f"{os.getloadavg()[0]:.2f}): time {statistics.median(time_ratios):.2f}x, "
              f"CPU {statistics.median(cpu_ratios):.2f}x, "
              f"peak memory {statistics.median(mem_ratios):.2f}x")
        print("\n".join(rows))


if __name__ == "__main__":
    main()
