"""roofgate benchmarks: each figure beside its goal, as a ratio measured in one run.

Run:  python bench/run.py                  (full: about 25 minutes on 2 cores)
      python bench/run.py --only 1,6       (some cases; numbers below)
      python bench/run.py --quick          (tiny inputs, one round: a smoke run)
      python bench/run.py --markdown       (print only the README block, at the end)
      python bench/run.py --update-readme  (also write that block into README.md)

Method (bench/measure.py): every figure is one whole process, interpreter start-up and
imports included, timed with ``time.perf_counter`` around it; peak memory is the
process's maximum resident set as GNU ``/usr/bin/time`` reports it. Candidate and reference run in rounds, in
turns (A B, B A, ...); the table shows medians and the ratio of the medians, with the
range of the round-by-round ratios. Cost per node is the marginal cost between two
graph sizes, (t(200k) - t(100k)) / 100k, so start-up does not hide growth. A sharded
audit's figure is its critical path: the slower shard's whole process plus the merge
process. A process far beyond its goal is stopped (its figure reads "> N") and not
repeated at larger sizes. The machine's load average is printed with the results.
Inputs are generated in code (bench/inputs.py, gate/synth/); nothing is downloaded.

Cases: 1 ResNet-50 vs its floor; 2 external data 4 KiB vs 4 GiB; 3 chain graphs of
10k-200k nodes (profile, evaluate --baseline, check); 4 zoos of 200 and 1000 models
(-j 1 vs -j 2, two half-zoo audits side by side as a reference, shards); 5 the HTML report; 6 start-up per command; 7 earlier rows
(fusion, constant folding, targets, demo).
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))  # bench/ is not a package

from case_cli import case_earlier, case_startup
from case_graphs import case_chains, case_external, case_resnet
from case_zoo import case_html, case_zoos
from context import Context, progress
from inputs import chain_model
from measure import ROOT, load_average, roofgate, run_process
from table import HEADER, Row

CASES: dict[str, Callable[[Context], list[Row]]] = {
    "1": case_resnet, "2": case_external, "3": case_chains, "4": case_zoos, "5": case_html,
    "6": case_startup, "7": case_earlier}
README_BEGIN = "<!-- bench:begin: python bench/run.py --update-readme -->"
README_END = "<!-- bench:end -->"
_chain_model = chain_model  # the name bench/against_ref.sh imports


class LoadWatch:
    """Samples the one-minute load average every few seconds while the cases run."""

    def __init__(self, every_s: float = 5.0) -> None:
        self.samples = [load_average()]
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, args=(every_s,), daemon=True)
        self._thread.start()

    def _watch(self, every_s: float) -> None:
        while not self._stop.wait(every_s):
            self.samples.append(load_average())

    def stop(self) -> str:
        self._stop.set()
        self.samples.append(load_average())
        cores = os.cpu_count() or 1
        median = statistics.median(self.samples)
        line = (f"Load average (1 min) while measuring: {self.samples[0]:.1f} at the start, "
                f"median {median:.1f}, max {max(self.samples):.1f}, {self.samples[-1]:.1f} "
                f"at the end, on {cores} cores (the benchmark's own process counts about 1, "
                f"2 during `-j 2`).")
        if median > cores:
            line += (" Other work shared the machine: the figures are provisional (ratios "
                     "hold better than absolute times).")
        return line


def _commit() -> str:
    try:
        done = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"],
                              capture_output=True, text=True, check=True)
        return done.stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def _header(options: argparse.Namespace) -> str:
    import onnx

    rounds = "one round each (--quick)" if options.quick else "rounds as noted per row"
    return (f"Measured {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} at commit "
            f"{_commit()}: {platform.machine()}, {os.cpu_count()} cores, "
            f"{_memory_gib():.0f} GiB, Python {platform.python_version()}, onnx "
            f"{onnx.__version__}; cases {','.join(options.only)}, {rounds}.")


def _memory_gib() -> float:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    except (ValueError, OSError):
        return 0.0


def warm_up(work: Path) -> None:
    """One untimed run, so compiling this checkout's bytecode is nobody's cost."""
    path = work / "warm.onnx"
    import onnx

    onnx.save(chain_model(30), str(path))
    run_process(roofgate("profile", str(path), "-t", "ws-64x64-4mib", "--format", "json"))
    run_process(roofgate("targets"))


def run_cases(options: argparse.Namespace) -> str:
    """Every chosen case in order; returns the README block (header, table, load)."""
    rows: list[str] = []
    header = _header(options)  # the commit measured, before anything can change it
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="roofgate-bench-") as tmp:
        warm_up(Path(tmp))
        watch = LoadWatch()
        if not options.markdown:
            print(HEADER, flush=True)
        for key in options.only:
            work = Path(tmp) / key
            work.mkdir()
            progress(f"case {key}: {CASES[key].__doc__ or ''}".strip())
            for row in CASES[key](Context(work, options.quick, options.runs)):
                rows.append(row.markdown())
                if not options.markdown:
                    print(rows[-1], flush=True)
        load = watch.stop()
    minutes = (time.perf_counter() - started) / 60
    return "\n".join([header, "", HEADER, *rows, "",
                      f"{load} The run took {minutes:.1f} minutes."])


def update_readme(block: str, readme: Path = ROOT / "README.md") -> None:
    """Replace the text between the benchmark markers in README.md with ``block``."""
    text = readme.read_text(encoding="utf-8")
    if README_BEGIN not in text or README_END not in text:
        raise SystemExit(f"{readme}: benchmark markers not found ({README_BEGIN} ... "
                         f"{README_END}); add them around the table")
    before, rest = text.split(README_BEGIN, 1)
    _, after = rest.split(README_END, 1)
    readme.write_text(f"{before}{README_BEGIN}\n{block}\n{README_END}{after}", encoding="utf-8")


def parse_only(value: str) -> list[str]:
    chosen = {part.strip() for part in value.split(",") if part.strip()}
    unknown = chosen - set(CASES)
    if unknown or not chosen:
        raise argparse.ArgumentTypeError(f"cases are {', '.join(CASES)}, not {value!r}")
    return [key for key in CASES if key in chosen]  # in case order, whatever the order given


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--only", type=parse_only, default=list(CASES),
                        help="cases to run, e.g. 1,6 (default: all)")
    parser.add_argument("--quick", action="store_true", help="tiny inputs, one round")
    parser.add_argument("--runs", type=int, default=None, help="rounds for every case")
    parser.add_argument("--markdown", action="store_true",
                        help="print only the README block, when every case is done")
    parser.add_argument("--update-readme", action="store_true",
                        help="write the block between the markers in README.md")
    options = parser.parse_args(argv)
    block = run_cases(options)
    print(block if options.markdown else "\n" + block.splitlines()[-1], flush=True)
    if options.update_readme:
        update_readme(block)


if __name__ == "__main__":
    main()
