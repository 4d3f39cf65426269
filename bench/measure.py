"""Whole-process measurements for bench/run.py: wall time, peak memory, interleaved rounds.

Every figure is one complete process, interpreter start-up and imports included, as a
user or a CI job pays it. Wall time is ``time.perf_counter`` around the process; peak
memory is its maximum resident set as GNU ``/usr/bin/time`` reports it (the largest
among it and the worker processes it waited for: a maximum, not a sum). GNU time starts
the process from its own small image: a child forked from this (large) driver directly
would report the driver's resident set as its own peak.
Candidates and references run in rounds (A B, then B A, ...) so that drifting load hits
both alike, and every figure is a median over the rounds.
"""

from __future__ import annotations

import concurrent.futures
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CLI_CODE = "from gate.cli import main; main()"
TIME = "/usr/bin/time"  # GNU time: the peak resident set of the process it starts
SAFETY_S = 1800.0  # no measured process may run longer than this


@dataclass(frozen=True)
class Sample:
    """One process: seconds (None when stopped at its time limit) and peak resident bytes."""

    seconds: float | None
    peak_bytes: int
    exit_code: int
    stderr: str = ""
    limit_s: float | None = None  # the time limit it was stopped at


class ProcessFailed(RuntimeError):
    """A measured process exited with a code the case does not expect."""


@dataclass(frozen=True)
class Command:
    """A process to measure: argv, working folder, extra environment, accepted exit codes."""

    argv: tuple[str, ...]
    cwd: Path | None = None
    env: Mapping[str, str] = field(default_factory=dict)
    ok_codes: tuple[int, ...] = (0, 1)


def python_env() -> dict[str, str]:
    """The environment of every measured process: this checkout's ``gate`` first."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT)
    env.pop("PYTHONSTARTUP", None)
    return env


def roofgate(*args: str, cwd: Path | None = None, code: str = CLI_CODE,
             ok_codes: tuple[int, ...] = (0, 1)) -> Command:
    """``roofgate ARGS`` as the console script runs it (this checkout's code)."""
    return Command((sys.executable, "-c", code, *args), cwd=cwd, ok_codes=ok_codes)


def python(code: str, *args: str) -> Command:
    """A bare ``python -c CODE ARGS`` (the references)."""
    return Command((sys.executable, "-c", code, *args), ok_codes=(0,))


def run_process(command: Command, timeout_s: float | None = None) -> Sample:
    """Run one whole process; stop it (and its workers) after ``timeout_s`` seconds."""
    with tempfile.TemporaryFile() as errors, tempfile.NamedTemporaryFile() as peak_file:
        start = time.perf_counter()
        proc = subprocess.Popen(
            (TIME, "-q", "-f", "%M", "-o", peak_file.name, *command.argv), cwd=command.cwd,
            env={**python_env(), **command.env}, stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL, stderr=errors,
            start_new_session=True)  # its own process group: a stop ends the workers too
        stopped = threading.Event()
        timer = _stop_timer(proc.pid, timeout_s, stopped)
        proc.wait()
        seconds = time.perf_counter() - start
        if timer:
            timer.cancel()
        errors.seek(0)
        stderr = errors.read().decode("utf-8", "replace")
        peak = _kib(Path(peak_file.name).read_text(encoding="ascii")) * 1024
    if stopped.is_set():
        return Sample(None, peak, proc.returncode, stderr, timeout_s)
    if proc.returncode not in command.ok_codes:
        raise ProcessFailed(f"{' '.join(command.argv[3:] or command.argv)} exited "
                            f"{proc.returncode}:\n{stderr[-2000:]}")
    return Sample(seconds, peak, proc.returncode, stderr)


def run_together(commands: Sequence[Command], timeout_s: float | None = None) -> float:
    """Wall seconds from starting every one of ``commands`` at once until the last ends
    (each a whole process, as ``run_process`` runs it; its failure is raised here)."""
    start = time.perf_counter()
    with concurrent.futures.ThreadPoolExecutor(len(commands)) as pool:
        samples = list(pool.map(lambda command: run_process(command, timeout_s), commands))
    seconds = time.perf_counter() - start
    if any(sample.seconds is None for sample in samples):
        raise ProcessFailed("a process run side by side ran past its time limit")
    return seconds


def _kib(report: str) -> int:
    """The peak resident kibibytes GNU time wrote (its last line; 0 if it wrote none)."""
    lines = report.strip().splitlines()
    return int(lines[-1]) if lines and lines[-1].isdigit() else 0


def _stop_timer(pid: int, timeout_s: float | None,
                stopped: threading.Event) -> threading.Timer | None:
    if timeout_s is None:
        return None

    def stop() -> None:
        stopped.set()
        try:
            os.killpg(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass

    timer = threading.Timer(timeout_s, stop)
    timer.daemon = True
    timer.start()
    return timer


@dataclass
class Series:
    """The samples of one command across the rounds of a case."""

    samples: list[Sample] = field(default_factory=list)

    @property
    def stopped(self) -> bool:
        return any(s.seconds is None for s in self.samples)

    @property
    def stopped_after(self) -> float | None:
        """The time limit a stopped run reached: its true time is longer."""
        limits = [s.limit_s for s in self.samples if s.seconds is None and s.limit_s]
        return max(limits) if limits else None

    @property
    def seconds(self) -> float | None:
        """Median wall seconds; None if any run was stopped (the median is then unknown)."""
        if not self.samples or self.stopped:
            return None
        return statistics.median(s.seconds for s in self.samples if s.seconds is not None)

    @property
    def peak_bytes(self) -> float | None:
        if not self.samples or self.stopped:
            return None
        return statistics.median(s.peak_bytes for s in self.samples)

    @property
    def runs(self) -> int:
        return len(self.samples)


TimeLimit = Callable[[str, dict[str, Series]], float | None]


def rounds(commands: Mapping[str, Command], runs: int, *, fixed_first: Sequence[str] = (),
           time_limit: TimeLimit | None = None,
           budget_s: float | None = None) -> dict[str, Series]:
    """Run every command once per round, ``runs`` rounds (fewer if ``budget_s`` seconds
    have passed when a round ends: the biggest inputs on slow code), in turns.

    The commands named in ``fixed_first`` open each round in that order (later commands'
    time limits may depend on them); the rest rotate their order round by round, so no
    command always runs first or last. A command stopped at its time limit is not run
    again: its result is already "more than the limit".
    """
    series = {name: Series() for name in commands}
    rotating = [name for name in commands if name not in fixed_first]
    started = time.perf_counter()
    for index in range(runs):
        if index and budget_s is not None and time.perf_counter() - started >= budget_s:
            break
        shift = index % len(rotating) if rotating else 0
        order = [*fixed_first, *rotating[shift:], *rotating[:shift]]  # A B, then B A
        for name in order:
            if series[name].stopped:
                continue
            limit = time_limit(name, series) if time_limit else None
            series[name].samples.append(run_process(commands[name], limit))
    return series


def load_average() -> float:
    """The one-minute load average (runnable processes, ours included)."""
    return os.getloadavg()[0]
