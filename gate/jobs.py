"""The one analysis path: load, profile and cost models into records, with one error mapping.

Every command that analyses a model (``profile``, ``evaluate``, ``baseline``,
``diff``, ``check``, ``audit``) comes through here:

* ``analyse_model`` loads a model once, profiles it once, costs that profile
  on every target and builds one ``RunRecord`` per target. It raises
  ``RoofgateError`` for input roofgate cannot analyse.
* ``run_jobs`` analyses many ``Job``s (in worker processes when asked) and
  maps each failure in one place: a model roofgate cannot analyse becomes an
  error message for that model (the run fails closed on it, unless a policy
  sets ``allow_unanalysable``); anything else is roofgate's own bug and stops
  the whole run as an ``InternalError`` (exit 3), whatever the policy says.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import itertools
import multiprocessing
import os
import shutil
import signal
import sys
import traceback
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

from gate.errors import InputError, InternalError, RoofgateError, one_safe_line
from gate.gcpause import cyclic_gc_paused
from gate.records import RunRecord, canonical_run, with_unknown_totals
from gate.targets.spec import TargetProfile

if TYPE_CHECKING:
    from gate.costmodel import ModelCost
    from gate.gitscan import BlobReader
    from gate.model.loader import LoadedModel
    from gate.profile import ModelProfile


@dataclass(frozen=True, slots=True)
class Job:
    """Analyse one model file on some targets (plain data: crosses process boundaries)."""

    model: str  # how reports name the model (repository-relative path)
    file: str  # the file to load (may be a temporary copy of a git blob)
    targets: tuple[str, ...]  # built-in names or absolute paths
    dims: tuple[tuple[str, int], ...] = ()
    precision: str | None = None
    key: str = ""  # what results are keyed by (default: ``model``), e.g. to tell base from head
    shapes: tuple[tuple[str, tuple[int, ...]], ...] = ()  # whole-input bindings (--shape)
    # the file's bytes when already read: ``file`` is then never opened
    data: bytes | None = field(default=None, repr=False)
    blob: GitBlob | None = None  # read the model from git, in the process that analyses it

    @property
    def result_key(self) -> str:
        return self.key or self.model


@dataclass(frozen=True, slots=True)
class GitBlob:
    """Where a job's model is when it comes from git: ``path`` at ``rev`` in the repository
    at ``root``. ``side`` ('base' or 'head') names it in messages; ``spill`` is the file a
    blob too large for memory, or a resolved Git LFS object, is written to.

    Why the worker reads it: handing the bytes from the parent to a worker copied every
    model through the parent (read, then pickled down a pipe), a serial step that kept
    ``check -j 2`` from paying. Each process keeps one ``git cat-file --batch``.
    """

    root: str
    rev: str
    path: str
    side: str
    spill: str


@dataclass(frozen=True, slots=True)
class Analysis:
    """Everything one model's analysis produced: the profile, each target's cost and record."""

    loaded: LoadedModel
    profile: ModelProfile
    costs: tuple[tuple[TargetProfile, ModelCost], ...]
    records: tuple[RunRecord, ...]


@dataclass(frozen=True, slots=True)
class JobOutcome:
    """What a worker sends back: its records (canonical, as a JSON round trip gives them;
    pickled as they are, far cheaper than dicts rebuilt into records), or why there are
    none."""

    key: str
    runs: tuple[RunRecord, ...] = ()
    error: str = ""  # the model cannot be analysed (exit 2 unless allow_unanalysable)
    internal: str = ""  # roofgate's own bug (exit 3, always)
    unread: str = ""  # the job's git blob could not be read (no analysis was tried)


Analysed = dict[str, tuple[list[RunRecord], str]]  # result key -> (runs, error text or '')


# --- one model ----------------------------------------------------------------------

def analyse_model(path: str, targets: Sequence[TargetProfile], *,
                  dims: Mapping[str, int] | None = None, precision: str | None = None,
                  shown_path: str | None = None,
                  shapes: Mapping[str, tuple[int, ...]] | None = None,
                  fusion: bool = True, data: bytes | None = None) -> Analysis:
    """Load and profile the model at ``path`` once, cost it on every target.

    ``fusion`` False costs layer by layer even on targets that declare ``fusion:``.
    ``data``: the file's bytes, already read (``path`` is then never opened).

    Records name the model ``shown_path`` (default ``path``). Load warnings (for
    example external data that was not opened) are kept as record notes so
    reports show them. Raises ``RoofgateError`` for input that cannot be analysed.
    """
    from gate.costmodel import cost_model
    from gate.model.loader import load_model
    from gate.profile import profile_model
    from gate.summarize import build_run_record

    _refuse_duplicate_targets(targets)
    loaded = load_model(path, dict(dims or {}), dict(shapes or {}), data=data)
    profile = profile_model(loaded, precision)
    name = shown_path if shown_path is not None else path
    costs = tuple((target, cost_model(profile, target, fusion=fusion)) for target in targets)
    records = []
    for target, cost in costs:
        record = build_run_record(name, profile, cost, target)
        extra = tuple(w for w in (*loaded.warnings, *target.warnings) if w not in record.notes)
        record = replace(record, notes=record.notes + extra) if extra else record
        records.append(with_unknown_totals(record))
    return Analysis(loaded, profile, costs, tuple(records))


def analyse(path: str, targets: Sequence[TargetProfile], *,
            dims: Mapping[str, int] | None = None, precision: str | None = None,
            shown_path: str | None = None,
            shapes: Mapping[str, tuple[int, ...]] | None = None,
            fusion: bool = True, data: bytes | None = None) -> list[RunRecord]:
    """The records of ``analyse_model`` (one per target)."""
    return list(analyse_model(path, targets, dims=dims, precision=precision,
                              shown_path=shown_path, shapes=shapes, fusion=fusion,
                              data=data).records)


def _refuse_duplicate_targets(targets: Sequence[TargetProfile]) -> None:
    seen: set[str] = set()
    for target in targets:
        if target.name in seen:
            raise InputError(f"target '{target.name}' is given twice; results are keyed by "
                             "target name, so give each target once")
        seen.add(target.name)


# --- the error mapping ----------------------------------------------------------------

def model_error_text(exc: RoofgateError, model: str, file: str | None = None) -> str:
    """The one-line message of a model roofgate cannot analyse, without a leading model path.

    Every report names the model of a ModelError already; a temporary copy
    (a git blob written to a file) is named by its model path instead.
    """
    message = exc.format_message()
    if exc.path and file is not None and file != model and str(exc.path) == file:
        message = message.replace(file, model)
    return error_text(message, model)


def error_text(message: str, model: str) -> str:
    """``message`` without a leading ``"<model>: "``: every report names the model of a
    ModelError already, so the path would show twice."""
    prefix = f"{model}: "
    return message[len(prefix):] if message.startswith(prefix) and message != prefix else message


def analyse_job(job: Job) -> JobOutcome:
    """Analyse ``job``; a model that cannot be analysed comes back as an error message,
    a git blob that cannot be read as ``unread``.

    Anything but a ``RoofgateError`` (and an ``InternalError`` too) propagates:
    it is roofgate's bug, never a property of the model.
    """
    from gate.targets import load_target

    try:
        file, data = _job_input(job)
    except UnreadableBlob as exc:
        return JobOutcome(job.result_key, unread=str(exc))
    try:
        targets = [load_target(name) for name in job.targets]
        with cyclic_gc_paused():  # millions of long-lived objects, no cycles (gate/gcpause.py)
            runs = [canonical_run(r) for r in analyse(
                file, targets, dims=dict(job.dims), precision=job.precision,
                shown_path=job.model, shapes=dict(job.shapes), data=data)]
    except InternalError:
        raise
    except RoofgateError as exc:
        return JobOutcome(job.result_key, error=model_error_text(exc, job.model, file))
    return JobOutcome(job.result_key, runs=tuple(runs))


# --- models read from git -------------------------------------------------------------

class UnreadableBlob(Exception):
    """A job's git blob cannot be read (git failed, or it stays a Git LFS pointer)."""


def _job_input(job: Job) -> tuple[str, bytes | None]:
    """The file to load and its bytes if already in memory (a git blob is read here)."""
    if job.blob is None:
        return job.file, job.data
    got = read_git_blob(job.blob)
    return (str(got), None) if isinstance(got, Path) else (job.file, got)


def read_git_blob(blob: GitBlob) -> bytes | Path:
    """The blob's bytes, or the spill file it went to; ``UnreadableBlob`` with the line
    reports show when git cannot give it or it stays an LFS pointer."""
    from gate import gitscan

    try:
        got = gitscan.read_model_blob(_blob_reader(blob.root), blob.rev, blob.path, blob.root,
                                      Path(blob.spill))
    except InputError as exc:  # e.g. the LFS smudge filter could not download
        raise UnreadableBlob(f"cannot read the {blob.side} side from git "
                             f"({exc.format_message()})") from None
    if got is None:
        raise UnreadableBlob(error_text(gitscan.lfs_error_message(blob.path, blob.side, blob.rev),
                                        blob.path))
    return got


_BLOB_READERS: dict[str, tuple[int, BlobReader]] = {}  # root -> (owning process, reader)


def _blob_reader(root: str) -> BlobReader:
    """This process's reader of ``root``: one per process, never one a forked worker
    inherited (its pipes belong to the parent's git)."""
    from gate.gitscan import BlobReader

    held = _BLOB_READERS.get(root)
    if held is None or held[0] != os.getpid():
        held = _BLOB_READERS[root] = (os.getpid(), BlobReader(root))
    return held[1]


def close_blob_readers() -> None:
    """End this process's git readers (workers' end with their processes)."""
    mine = [reader for pid, reader in _BLOB_READERS.values() if pid == os.getpid()]
    _BLOB_READERS.clear()
    for reader in mine:
        reader.close()


def _analyse_job_in_worker(job: Job) -> JobOutcome:
    """``analyse_job`` in a worker process: a bug travels back as text (tracebacks do not
    pickle), and the parent raises it as an InternalError."""
    try:
        return analyse_job(job)
    except Exception as exc:  # noqa: BLE001  (reported to the parent, which exits 3)
        detail = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
        trace = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        return JobOutcome(job.result_key, internal=f"{detail}\n{trace}")


def internal_error(model: str, detail: str) -> InternalError:
    """The InternalError of a bug met while analysing ``model`` (exit 3, whatever the policy)."""
    return InternalError(f"internal error while analysing {one_safe_line(model)} "
                         f"({detail.splitlines()[0]}); rerun with --debug and report it")


# --- many models --------------------------------------------------------------------

def run_jobs(jobs: Sequence[Job], workers: int,
             progress: Callable[[int, int, str], None] | None = None,
             done: Callable[[str, Analysed], None] | None = None,
             unread: Callable[[str, str], None] | None = None) -> Analysed:
    """Analyse every job (in ``workers`` processes when > 1); results keyed by result key.

    ``done(key, results so far)`` runs in this process as each result arrives, while
    the workers go on (e.g. to judge a model at once rather than all at the end).
    ``unread(model, why)`` gets each job whose git blob could not be read; such a job
    has no result. Raises ``InternalError`` on the first bug met, in-process or in a
    worker.
    """
    out: Analysed = {}
    total = len(jobs)

    def keep(outcome: JobOutcome, model: str) -> None:
        if outcome.internal:
            raise internal_error(model, outcome.internal)
        if outcome.unread:
            if unread is None:
                raise InternalError(f"a git blob of {one_safe_line(model)} could not be read "
                                    "and nothing was asked to take the message")
            unread(model, outcome.unread)
            return
        out[outcome.key] = (list(outcome.runs), outcome.error)
        if progress:
            progress(len(out), total, model)
        if done:
            with cyclic_gc_paused():  # judging a large model: the same reason
                done(outcome.key, out)

    started = _STARTED.pop() if _STARTED else None  # workers_started's, if any
    if not jobs:
        if started is not None:
            _stop(started[0])  # nothing to analyse: no waiting for the workers' imports
        return out
    if started is None and (workers <= 1 or total <= 1):
        for job in jobs:
            keep(_analyse_in_process(job), job.model)
        return out
    pool, count = started or (_new_pool(min(workers, total)), min(workers, total))
    _run_in_processes(iter(jobs), pool, count, keep)
    return out


IN_FLIGHT_PER_WORKER = 2  # jobs handed out ahead per worker: no idle worker, bounded memory


def _run_in_processes(jobs: Iterator[Job], pool: concurrent.futures.ProcessPoolExecutor,
                      workers: int, keep: Callable[[JobOutcome, str], None]) -> None:
    """Analyse ``jobs`` in the ``workers`` processes of ``pool`` (started once, reused for
    every job), handing each outcome to ``keep``; the pool is shut down at the end.

    Jobs are handed out as workers finish, a few ahead (a worker reads a git blob
    itself, so only the models being analysed are in memory). On Ctrl-C, SIGTERM
    (raised as SystemExit by the CLI) or any error the worker processes are
    terminated at once instead of finishing their models (which could take
    minutes after the run was stopped).
    """
    try:
        pending: dict[concurrent.futures.Future[JobOutcome], Job] = {}
        for job in itertools.islice(jobs, workers * IN_FLIGHT_PER_WORKER):
            pending[pool.submit(_analyse_job_in_worker, job)] = job
        while pending:
            done, _ = concurrent.futures.wait(pending,
                                              return_when=concurrent.futures.FIRST_COMPLETED)
            for future in done:
                job = pending.pop(future)
                keep(future.result(), job.model)
                following = next(jobs, None)
                if following is not None:
                    pending[pool.submit(_analyse_job_in_worker, following)] = following
    except BaseException:
        _stop(pool)
        raise
    pool.shutdown()


# --- worker processes ------------------------------------------------------------------

# workers_started's pool and its number of workers, until a run takes it
_STARTED: list[tuple[concurrent.futures.ProcessPoolExecutor, int]] = []


@contextlib.contextmanager
def workers_started(workers: int) -> Iterator[None]:
    """Start the worker processes of a parallel run (``workers`` > 1) now; the first
    ``run_jobs`` in the block uses them (and shuts them down), and the block's end stops
    them if nothing did.

    Why early: each worker imports the analysis stack (onnx and numpy, about 0.13 s)
    itself, while this process reads the config and walks the zoo, instead of this
    process importing it alone before forking; this process never imports it.
    Only up to one per CPU: ``-j`` above that (more processes than the models need,
    each holding its imports) waits for the run, which starts at most one per model.
    """
    if workers <= 1 or workers > (os.cpu_count() or 1) or _STARTED:
        yield
        return
    pool = _new_pool(workers)
    pool.submit(_ready)  # the first task starts the workers (every one, under fork)
    _STARTED.append((pool, workers))
    try:
        yield
    finally:
        if (pool, workers) in _STARTED:  # the block ended before any run took the workers
            _STARTED.remove((pool, workers))
            _stop(pool)


def _new_pool(workers: int) -> concurrent.futures.ProcessPoolExecutor:
    return concurrent.futures.ProcessPoolExecutor(max_workers=workers,
                                                  initializer=_worker_start)


def _ready() -> None:
    """A task that does nothing: submitting it starts the workers."""


def _stop(pool: concurrent.futures.ProcessPoolExecutor) -> None:
    """Stop ``pool`` at once: its queued jobs are dropped, its workers terminated."""
    pool.shutdown(wait=False, cancel_futures=True)
    for child in multiprocessing.active_children():
        child.terminate()


def _worker_start() -> None:
    """In a new worker: its signal handling, then the analysis stack, imported once."""
    _worker_signals()
    import gate.costmodel
    import gate.model.loader
    import gate.profile
    import gate.summarize  # noqa: F401


def _worker_signals() -> None:
    """In a worker: SIGTERM kills at once (the executor's worker loop would catch the
    SystemExit a Python handler raises and take the next model); Ctrl-C is left to the
    parent, which terminates the workers."""
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _analyse_in_process(job: Job) -> JobOutcome:
    """``analyse_job`` in this process; a bug becomes an InternalError caused by it (so
    ``--debug`` shows its traceback)."""
    try:
        return analyse_job(job)
    except InternalError:
        raise
    except Exception as exc:
        detail = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
        raise internal_error(job.model, detail) from exc


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
