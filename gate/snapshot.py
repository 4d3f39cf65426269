"""Baseline snapshots: the records of models on targets, saved as versioned JSON.

A snapshot holds, per model and per target, the model totals, the target's key
figures and every layer's metrics (``gate.records.run_to_dict``), so a later
run can diff against it and apply regression rules without re-profiling the
old model. Writing is deterministic: runs sorted by (model, target), keys
sorted, floats rounded to 12 significant digits, a final newline.
The same records always give the same bytes, so a committed baseline only
changes when a figure does.

Text layout: ``gate.jsontext.canonical_json`` (one layer per line; whitespace only,
so either layout reads the same and it needs no version bump).

Layout (version 2)::

    {
      "format": "roofgate-snapshot",
      "version": 2,
      "runs": [ {model, model_name, target, precision, metrics, target_figures,
                 unmodelled, notes, layers: [ {name, op_type, signature, ..., metrics} ]} ]
    }

Version history (bump ``SNAPSHOT_VERSION`` on any change a reader must know about,
and add a line here and in docs/reports.md):

  1  first version. Layers carry ``fused_into`` and ``fused_ops`` (layer fusion);
     a layer without them reads as not fused.
  2  a metric may be null: unknown (a model none of whose work could be costed), never 0.
     Version 1 files read unchanged.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Mapping, Sequence
from functools import partial
from typing import Any, TextIO

from gate.errors import InputError
from gate.gcpause import cyclic_gc_paused
from gate.jsontext import canonical_json, canonical_json_pieces
from gate.outfile import write_files, write_text
from gate.records import RunRecord, run_from_dict, run_to_dict

SNAPSHOT_FORMAT = "roofgate-snapshot"
SNAPSHOT_VERSION = 2
MAX_SNAPSHOT_BYTES = 256 * 1024 * 1024


def snapshot_to_dict(runs: Iterable[RunRecord]) -> dict[str, Any]:
    """The JSON-ready snapshot of ``runs`` (sorted by model, then target)."""
    ordered = sorted(runs, key=lambda r: r.key)
    _refuse_duplicates([r.key for r in ordered], "records")
    return {
        "format": SNAPSHOT_FORMAT,
        "version": SNAPSHOT_VERSION,
        "runs": [run_to_dict(run) for run in ordered],
    }


def dumps_snapshot(runs: Iterable[RunRecord]) -> str:
    """The snapshot text of ``runs``."""
    return canonical_json(snapshot_to_dict(runs))


def write_snapshot(runs: Iterable[RunRecord], path: str) -> None:
    """Write a snapshot to ``path`` ('-' = stdout); a file is replaced atomically.

    The text goes to the file in pieces (never whole in memory). A snapshot
    larger than ``read_snapshot`` accepts is refused (exit 2) rather than
    written: it could never be used as a baseline.
    """
    with cyclic_gc_paused():
        document = snapshot_to_dict(runs)
    if path == "-":
        text = canonical_json(document)
        _refuse_oversized(len(text), path)
        write_text(path, text, "baseline snapshot")
        return
    write_files([(path, "baseline snapshot", partial(_write_bounded, document, path))])


def _write_bounded(document: dict[str, Any], path: str, stream: TextIO) -> None:
    """Write ``document`` to ``stream``, stopping (InputError) once it passes the size limit."""
    size_bytes = 0
    for piece in canonical_json_pieces(document):
        size_bytes += len(piece)  # ASCII only (ensure_ascii), so characters are bytes
        _refuse_oversized(size_bytes, path)
        stream.write(piece)


def _refuse_oversized(size_bytes: int, path: str) -> None:
    if size_bytes > MAX_SNAPSHOT_BYTES:
        raise InputError(f"the snapshot would be at least {size_bytes} bytes, over the "
                         f"{MAX_SNAPSHOT_BYTES}-byte limit a baseline may have; write one "
                         "snapshot per part of the zoo (audit PATHS --snapshot ...)", path)


def read_snapshot(path: str) -> tuple[RunRecord, ...]:
    """Read a snapshot file; every problem is an InputError naming the file and the fix."""
    try:
        size = os.path.getsize(path)
        if size > MAX_SNAPSHOT_BYTES:
            raise InputError(f"snapshot is {size} bytes, over the {MAX_SNAPSHOT_BYTES}-byte limit",
                             path)
        with open(path, "rb") as stream:
            raw = stream.read()
    except OSError as exc:
        raise InputError(f"cannot read the baseline snapshot ({exc.strerror})", path) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("not a roofgate snapshot (not UTF-8 text)", path) from None
    return loads_snapshot(text, path)


def loads_snapshot(text: str, path: str = "<snapshot>") -> tuple[RunRecord, ...]:
    """Parse snapshot text (``path`` only names it in messages)."""
    with cyclic_gc_paused():  # parsing builds no cycles; a large baseline read twice as fast
        return _parse_snapshot(text, path)


def _parse_snapshot(text: str, path: str) -> tuple[RunRecord, ...]:
    data = load_versioned_json(text, path, "snapshot", SNAPSHOT_FORMAT, SNAPSHOT_VERSION,
                               remedy="regenerate it with `roofgate baseline`", oldest_version=1)
    runs_data = data.get("runs")
    if not isinstance(runs_data, list):
        raise InputError("snapshot has no 'runs' list; regenerate it with `roofgate baseline`",
                         path)
    runs = tuple(_run_from(item, index, path) for index, item in enumerate(runs_data))
    _refuse_duplicates([r.key for r in runs], path)
    return runs


def load_versioned_json(text: str, path: str, what: str, expected_format: str,
                        supported_version: int, *, remedy: str,
                        oldest_version: int | None = None) -> Mapping[str, Any]:
    """Parse a versioned roofgate JSON document (snapshot, result), refusing others clearly."""
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"not a roofgate {what} (invalid JSON at line {exc.lineno}, "
                         f"column {exc.colno}: {exc.msg})", path) from None
    check_format(data, expected_format, supported_version, path, remedy=remedy,
                 oldest_version=oldest_version)
    return data  # type: ignore[no-any-return]  # check_format proved it is a mapping


def check_format(data: Any, expected_format: str, supported_version: int, path: str,
                 *, remedy: str, oldest_version: int | None = None) -> None:
    """Refuse a document that is not ``expected_format`` at a version from ``oldest_version``
    (default: only ``supported_version``) to ``supported_version``, clearly."""
    if not isinstance(data, Mapping) or data.get("format") != expected_format:
        found = data.get("format") if isinstance(data, Mapping) else type(data).__name__
        raise InputError(f"not a {expected_format} file (format is {found!r}); {remedy}", path)
    version = data.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise InputError(f"{expected_format} without an integer 'version'; {remedy}", path)
    if version > supported_version:
        raise InputError(
            f"{expected_format} version {version} was written by a newer roofgate; this one "
            f"reads version {supported_version}: upgrade roofgate, or {remedy}", path)
    if version < (supported_version if oldest_version is None else oldest_version):
        raise InputError(
            f"{expected_format} version {version} is older than this roofgate reads "
            f"(version {supported_version}); {remedy}", path)


def snapshot_keys(runs: Sequence[RunRecord]) -> list[tuple[str, str]]:
    """The (model, target) pairs a snapshot holds, sorted."""
    return sorted(r.key for r in runs)


def _run_from(item: Any, index: int, path: str) -> RunRecord:
    try:
        if not isinstance(item, Mapping):
            raise TypeError("not an object")
        return run_from_dict(item)
    except KeyError as exc:
        problem = f"missing key {exc.args[0]!r}"
    except (TypeError, ValueError, AttributeError) as exc:
        problem = str(exc)
    raise InputError(f"runs[{index}]: {problem}; the snapshot is damaged, regenerate it with "
                     "`roofgate baseline`", path)


def _refuse_duplicates(keys: list[tuple[str, str]], where: str) -> None:
    seen: set[tuple[str, str]] = set()
    for key in keys:
        if key in seen:
            raise InputError(f"two runs of model {key[0]!r} on target {key[1]!r}; "
                             "each model x target may appear once", where)
        seen.add(key)
