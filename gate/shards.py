"""Sharded audits: deal the zoo to N CI jobs, write each shard's result, merge them back.

Shards: the sorted list of model paths is dealt round-robin, model ``k``
(0-based) going to shard ``k % N + 1``. Every shard job sees the same
checkout, so the deal is deterministic and balanced to within one model.
Shard results combine with ``gate.judge.combine_results``, which is
order-independent, so a merged audit reports exactly like an unsharded one.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from gate import __version__
from gate.errors import InputError
from gate.gcpause import cyclic_gc_paused
from gate.judge import combine_results
from gate.outfile import open_output
from gate.result import GateResult, result_from_dict, result_to_dict

SHARD_FORMAT = "roofgate-audit-shard"
SHARD_VERSION = 1  # history: 1 = first version (shard index/count, model-set digest, result)


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
    # compact: a file for machines (merge), and without indent json uses its C encoder
    with cyclic_gc_paused():
        data = json.dumps(shard_to_dict(result, index, count, models), sort_keys=True,
                          allow_nan=False, separators=(",", ":"))
    with open_output(path, "shard result") as stream:
        stream.write(data + "\n")


def read_shards(paths: Sequence[str]) -> GateResult:
    """Read shard files and combine them; InputError on a missing, extra or mismatched shard."""
    with cyclic_gc_paused():  # parsing builds no cycles; large shards read twice as fast
        return _combined(paths)


def _combined(paths: Sequence[str]) -> GateResult:
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
