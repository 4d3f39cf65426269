"""Baseline snapshots: the records of models on targets, saved as versioned JSON.

A snapshot holds, per model and per target, the model totals, the target's key
figures and every layer's metrics (``gate.records.run_to_dict``), so a later
run can diff against it and apply regression rules without re-profiling the
old model. Writing is deterministic: runs sorted by (model, target), keys
sorted, two-space indent (flat containers on one line), floats rounded to ``FLOAT_DIGITS`` significant
digits, a final newline. The same records always give the same bytes, so a
committed baseline only changes when a figure does.

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
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from gate.errors import InputError, InternalError
from gate.logsafe import defuse_json_markers
from gate.outfile import write_text
from gate.records import RunRecord, run_from_dict, run_to_dict

SNAPSHOT_FORMAT = "roofgate-snapshot"
SNAPSHOT_VERSION = 2
FLOAT_DIGITS = 12  # significant digits kept; the diff's float tolerance is below this
MAX_SNAPSHOT_BYTES = 256 * 1024 * 1024


def canonical_json(data: Any) -> str:
    """``data`` as deterministic JSON text: sorted keys, indent 2, rounded floats, final newline.

    Non-ASCII is written as ``\\uXXXX`` escapes, so any name (even one holding a
    lone surrogate, which UTF-8 cannot encode) is written and read back exactly;
    ``##`` is written ``#\\u0023`` so no line can carry a CI runner marker.

    Raises InternalError on a NaN or infinity: records must never carry one, and
    JSON cannot (``NaN`` is not JSON).
    """
    try:
        text = defuse_json_markers(_pretty(_rounded(data), ""))
    except ValueError as exc:
        raise InternalError(f"cannot write JSON with a non-finite number ({exc})") from None
    return text + "\n"


def _pretty(value: Any, indent: str) -> str:
    """Indented JSON, except that a container holding only scalars stays on one line.

    Why: ``json.dumps(indent=...)`` runs the pure-Python encoder, which made report
    writing the slowest part of an audit; the flat containers (a layer's metrics,
    the most numerous) go through the C encoder in one call instead. Keys sorted.
    """
    if isinstance(value, dict) and value and any(isinstance(v, (dict, list)) for v in value.values()):
        inner = indent + "  "
        items = [f"{inner}{_compact(str(key))}: {_pretty(value[key], inner)}"
                 for key in sorted(value)]
        return "{\n" + ",\n".join(items) + "\n" + indent + "}"
    if isinstance(value, list) and value and any(isinstance(v, (dict, list)) for v in value):
        inner = indent + "  "
        return "[\n" + ",\n".join(inner + _pretty(v, inner) for v in value) + "\n" + indent + "]"
    return _compact(value)


_ENCODER = json.JSONEncoder(sort_keys=True, separators=(", ", ": "), ensure_ascii=True,
                            allow_nan=False)  # one encoder: building one per value cost most


def _compact(value: Any) -> str:
    """``value`` as one line of JSON; scalars written directly, exactly as the encoder
    would (floats are finite here: ``_rounded`` refused the others)."""
    kind = type(value)
    if kind is str:
        return json.encoder.encode_basestring_ascii(value)
    if kind is int or kind is float:
        return repr(value)
    if value is None:
        return "null"
    if kind is bool:
        return "true" if value else "false"
    return _ENCODER.encode(value)


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

    A snapshot larger than ``read_snapshot`` accepts is refused (exit 2) rather
    than written: it could never be used as a baseline.
    """
    text = dumps_snapshot(runs)
    size_bytes = len(text)  # ASCII only (ensure_ascii), so characters are bytes
    if size_bytes > MAX_SNAPSHOT_BYTES:
        raise InputError(f"the snapshot would be {size_bytes} bytes, over the "
                         f"{MAX_SNAPSHOT_BYTES}-byte limit a baseline may have; write one "
                         "snapshot per part of the zoo (audit PATHS --snapshot ...)", path)
    write_text(path, text, "baseline snapshot")


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


def _rounded(value: Any) -> Any:
    """A copy of ``value`` with every float rounded to FLOAT_DIGITS significant digits."""
    kind = type(value)  # exact types first: abstract isinstance checks cost most here
    if kind is dict:
        return {str(k): _rounded(v) for k, v in value.items()}
    if kind is str or kind is int or kind is bool or value is None:
        return value
    if isinstance(value, float):
        if not math.isfinite(value):
            raise InternalError(f"cannot write a non-finite number ({value}) to JSON")
        rounded = float(f"{value:.{FLOAT_DIGITS}g}")
        return 0.0 if rounded == 0 else rounded  # no "-0.0"
    if isinstance(value, Mapping):
        return {str(k): _rounded(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_rounded(v) for v in value]
    return value
