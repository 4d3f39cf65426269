"""The engine behind ``check``, ``audit`` and ``merge``: analyse jobs, judge per model, combine.

Every model is analysed on its own (``analyse_job``, a top-level function so
a process pool can pickle it) and judged on its own, and per-model results are
combined by one order-independent function (``combine_results``). That is
what makes ``-j 1``, ``-j 8`` and a sharded audit merged with ``roofgate
merge`` produce the same GateResult, and so byte-identical reports.

Shards: the sorted list of model paths is dealt round-robin, model ``k``
(0-based) going to shard ``k % N + 1``. Every shard job sees the same
checkout, so the deal is deterministic and balanced to within one model.
"""

from __future__ import annotations

import concurrent.futures
import hashlib
import json
import os
import shutil
import sys
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any, TextIO

from gate import __version__
from gate.errors import InputError, RoofgateError
from gate.outfile import open_output
from gate.records import RunRecord, run_from_dict, run_to_dict
from gate.result import GateResult, ModelError, result_from_dict, result_to_dict

SHARD_FORMAT = "roofgate-audit-shard"
SHARD_VERSION = 1  # history: 1 = first version (shard index/count, model-set digest, result)
TREND_MIN_CHANGE = 0.01  # a total moving less than 1% is "unchanged"
TREND_MAX_LINES = 20


@dataclass(frozen=True, slots=True)
class Job:
    """Analyse one model file on some targets (plain data: crosses process boundaries)."""

    model: str  # how reports name the model (repository-relative path)
    file: str  # the file to load (may be a temporary copy of a git blob)
    targets: tuple[str, ...]  # built-in names or absolute paths
    dims: tuple[tuple[str, int], ...] = ()
    precision: str | None = None
    key: str = ""  # what results are keyed by (default: ``model``), e.g. to tell base from head

    @property
    def result_key(self) -> str:
        return self.key or self.model


def utc_today() -> date:
    """Today's date in UTC (waiver expiry is judged against it)."""
    return datetime.now(timezone.utc).date()


def analyse_job(job: Job) -> tuple[str, list[dict[str, Any]], str]:
    """Analyse ``job``: (result key, run dicts, error message or ''). Never raises.

    Runs in a worker process, so results travel as JSON-ready dicts; a model
    that cannot be analysed comes back as an error message, which fails the
    gate (fail closed) without stopping the rest of the audit.
    """
    from gate.pipeline import analyse
    from gate.targets import load_target

    try:
        targets = [load_target(name) for name in job.targets]
        runs = analyse(job.file, targets, dims=dict(job.dims), precision=job.precision,
                       shown_path=job.model)
        return job.result_key, [run_to_dict(r) for r in runs], ""
    except RoofgateError as exc:
        message = exc.format_message()
        if exc.path and job.file != job.model:  # a temporary copy: name the model instead
            message = message.replace(str(exc.path), job.model)
        return job.result_key, [], error_text(message, job.model)
    except Exception as exc:  # noqa: BLE001  (fail closed: one broken model must not pass)
        detail = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
        return job.result_key, [], (f"internal error while analysing ({detail}); "
                                    "rerun with roofgate --debug profile and report it")


def error_text(message: str, model: str) -> str:
    """``message`` without a leading ``"<model>: "``: every report names the model of a
    ModelError already, so the path would show twice."""
    prefix = f"{model}: "
    return message[len(prefix):] if message.startswith(prefix) and message != prefix else message


def run_jobs(jobs: Sequence[Job], workers: int,
             progress: Callable[[int, int, str], None] | None = None,
             ) -> dict[str, tuple[list[RunRecord], str]]:
    """Analyse every job (in ``workers`` processes when > 1); results keyed by model."""
    out: dict[str, tuple[list[RunRecord], str]] = {}
    total = len(jobs)

    def keep(model: str, dicts: list[dict[str, Any]], error: str) -> None:
        out[model] = ([run_from_dict(d) for d in dicts], error)
        if progress:
            progress(len(out), total, model)

    if workers <= 1 or total <= 1:
        for job in jobs:
            keep(*analyse_job(job))
        return out
    with concurrent.futures.ProcessPoolExecutor(max_workers=min(workers, total)) as pool:
        futures = [pool.submit(analyse_job, job) for job in jobs]
        for future in concurrent.futures.as_completed(futures):
            keep(*future.result())
    return out


def judge_model(head: Sequence[RunRecord], base: Sequence[RunRecord], policies: Sequence[Any],
                *, command: str, today: date, errors: Sequence[ModelError] = (),
                notes: Sequence[str] = ()) -> GateResult:
    """Judge one model (all its targets) with the pipeline's ``judge``."""
    from gate.pipeline import judge

    return judge(list(head), list(base), list(policies), command=command, today=today,
                 errors=tuple(errors), notes=tuple(notes))


def combine_results(results: Iterable[GateResult], command: str) -> GateResult:
    """One GateResult from many; order-independent, so shards merge like an unsharded run."""
    results = list(results)
    errors = tuple(sorted({(e.model, e.message) for r in results for e in r.errors}))
    erroring = [r for r in results if r.errors]
    return GateResult(
        command=command,
        policies=tuple(sorted({p for r in results for p in r.policies})),
        entries=tuple(sorted((e for r in results for e in r.entries),
                             key=lambda e: (e.model, e.target))),
        errors=tuple(ModelError(m, msg) for m, msg in errors),
        notes=tuple(sorted({n for r in results for n in r.notes})),
        allow_errors=bool(erroring) and all(r.allow_errors for r in erroring),
    )


def with_notes(result: GateResult, notes: Sequence[str]) -> GateResult:
    """``result`` with ``notes`` placed before its own."""
    return GateResult(result.command, result.policies, result.entries, result.errors,
                      tuple(notes) + result.notes, result.allow_errors)


# --- trend against the previous snapshot ------------------------------------------

def trend_notes(result: GateResult) -> list[str]:
    """Which models got better or worse than the previous snapshot (latency and energy)."""
    worse, better, same = [], [], 0
    for entry in result.entries:
        if entry.head is None or entry.base is None:
            continue
        moves = _moves(entry.base, entry.head)
        if any(change > TREND_MIN_CHANGE for _, change in moves):
            worse.append(_trend_line(entry.model, entry.target, moves))
        elif any(change < -TREND_MIN_CHANGE for _, change in moves):
            better.append(_trend_line(entry.model, entry.target, moves))
        else:
            same += 1
    if not (worse or better or same):
        return []
    lines = [(f"Trend vs the previous snapshot: {len(worse)} worse, {len(better)} better, "
              f"{same} unchanged (latency or energy moved by more than "
              f"{TREND_MIN_CHANGE:.0%}).")]
    for label, items in (("worse", worse), ("better", better)):
        lines += [f"{label}: {item}" for item in items[:TREND_MAX_LINES]]
        if len(items) > TREND_MAX_LINES:
            lines.append(f"{label}: ... and {len(items) - TREND_MAX_LINES} more")
    return lines


def _moves(base: RunRecord, head: RunRecord) -> list[tuple[str, float]]:
    out = []
    for metric in ("latency_s", "energy_j"):
        old, new = float(base.metrics.get(metric, 0)), float(head.metrics.get(metric, 0))
        if old > 0:
            out.append((metric, (new - old) / old))
    return out


def _trend_line(model: str, target: str, moves: list[tuple[str, float]]) -> str:
    parts = ", ".join(f"{metric.removesuffix('_s').removesuffix('_j')} {change:+.1%}"
                      for metric, change in moves if abs(change) > TREND_MIN_CHANGE)
    return f"{model} on {target}: {parts}"


# --- shards ---------------------------------------------------------------------------

def parse_shard(text: str) -> tuple[int, int]:
    """``"2/4"`` -> ``(2, 4)``; InputError unless 1 <= I <= N."""
    index, sep, count = text.partition("/")
    if not sep or not index.strip().isdigit() or not count.strip().isdigit():
        raise InputError(f"--shard '{text}': expected I/N, e.g. 1/4")
    i, n = int(index), int(count)
    if n < 1 or not 1 <= i <= n:
        raise InputError(f"--shard '{text}': I must be between 1 and N (N >= 1)")
    return i, n


def shard_share(models: Sequence[str], index: int, count: int) -> list[str]:
    """The models shard ``index`` of ``count`` analyses (sorted round-robin deal)."""
    return [m for k, m in enumerate(sorted(models)) if k % count == index - 1]


def models_digest(models: Iterable[str]) -> str:
    """A fingerprint of the full model set, so merge can refuse shards of different checkouts."""
    joined = "\0".join(sorted(models)).encode("utf-8", "surrogateescape")
    return hashlib.sha256(joined).hexdigest()


def shard_to_dict(result: GateResult, index: int, count: int,
                  models: Sequence[str]) -> dict[str, Any]:
    return {
        "format": SHARD_FORMAT, "version": SHARD_VERSION, "roofgate": __version__,
        "shard": {"index": index, "count": count},
        "models_total": len(models), "models_digest": models_digest(models),
        "result": result_to_dict(result),
    }


def write_shard(path: str, result: GateResult, index: int, count: int,
                models: Sequence[str]) -> None:
    data = json.dumps(shard_to_dict(result, index, count, models), indent=1, sort_keys=True,
                      allow_nan=False)
    with open_output(path, "shard result") as stream:
        stream.write(data + "\n")


def read_shards(paths: Sequence[str]) -> GateResult:
    """Read shard files and combine them; InputError on a missing, extra or mismatched shard."""
    shards = [_read_shard(p) for p in paths]
    if not shards:
        raise InputError("no shard files given; pass every audit-shard-*.json")
    first_path, first = shards[0]
    for path, shard in shards[1:]:
        for key in ("roofgate", "models_digest", "models_total"):
            if shard[key] != first[key]:
                raise InputError(f"{path}: {key} differs from {first_path}; every shard must "
                                 "come from the same roofgate version and checkout")
        if shard["shard"]["count"] != first["shard"]["count"]:
            raise InputError(f"{path}: shard count differs from {first_path}")
    count = int(first["shard"]["count"])
    seen: dict[int, str] = {}
    for path, shard in shards:
        index = int(shard["shard"]["index"])
        if index in seen:
            raise InputError(f"{path}: shard {index}/{count} given twice (also {seen[index]})")
        seen[index] = path
    missing = sorted(set(range(1, count + 1)) - set(seen))
    if missing:
        raise InputError(f"missing shard(s) {', '.join(f'{i}/{count}' for i in missing)}; "
                         "did a matrix job fail to upload its result?")
    results = [result_from_dict(shard["result"]) for _, shard in shards]
    return combine_results(results, results[0].command)


def _read_shard(path: str) -> tuple[str, dict[str, Any]]:
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("file not found", path) from None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"not a readable shard result ({type(exc).__name__})", path) from None
    if not isinstance(data, dict) or data.get("format") != SHARD_FORMAT:
        raise InputError("not a roofgate audit shard (written by audit --shard)", path)
    if data.get("version") != SHARD_VERSION:
        raise InputError(f"shard format version {data.get('version')!r} is not supported "
                         f"(this roofgate reads {SHARD_VERSION}); rerun the shards", path)
    try:
        int(data["shard"]["index"]), int(data["shard"]["count"])
        data["roofgate"], data["models_digest"], data["models_total"], data["result"]
    except (KeyError, TypeError, ValueError):
        raise InputError("shard file is missing fields; rerun the shard", path) from None
    return path, data


# --- progress -----------------------------------------------------------------------

class Progress:
    """Progress on stderr: a redrawn bar on a terminal, plain lines otherwise."""

    def __init__(self, stream: TextIO | None = None, *, tty: bool | None = None,
                 label: str = "audit") -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.tty = self.stream.isatty() if tty is None else tty
        self.label = label

    def __call__(self, done: int, total: int, model: str) -> None:
        from gate.report.text import term_safe

        name = term_safe(model)
        if not self.tty:
            self.stream.write(f"roofgate {self.label}: [{done}/{total}] {name}\n")
            self.stream.flush()
            return
        width = shutil.get_terminal_size((80, 20)).columns
        bar_cells = 24
        filled = bar_cells * done // max(total, 1)
        head = f"\r{done:>{len(str(total))}}/{total} [{'#' * filled}{'.' * (bar_cells - filled)}] "
        room = max(width - len(head), 10)
        self.stream.write(head + name[-room:].ljust(room)[:room])
        if done == total:
            self.stream.write("\n")
        self.stream.flush()


def default_workers(requested: int) -> int:
    """``-j 0`` means one worker per CPU."""
    return requested if requested > 0 else (os.cpu_count() or 1)


def base_by_model(runs: Iterable[RunRecord]) -> Mapping[str, list[RunRecord]]:
    """Group baseline records by model path."""
    out: dict[str, list[RunRecord]] = {}
    for run in runs:
        out.setdefault(run.model, []).append(run)
    return out
