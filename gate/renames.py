"""Renames git does not pair: a deleted and an added model with the same layer structure.

Git pairs a rename by byte similarity, so a model renamed *and* re-exported (new
bytes, same network) shows as a deletion plus an addition, and the regression
rules would judge the addition as new. Here the two are paired by what they
hold instead: the same sequence of layer op types. Among several candidates
the one sharing the most layer signatures (op type, shapes, dtypes) wins,
then the closest file name. There is no limit on the number of files.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping, Sequence

from gate.records import RunRecord


def pair_by_structure(deleted: Mapping[str, Sequence[RunRecord]],
                      added: Mapping[str, Sequence[RunRecord]]) -> dict[str, str]:
    """``{added model: deleted model}`` for every added model whose layers match a deleted one's.

    Each deleted model pairs at most once; models without records (not
    analysed) never pair.
    """
    pairs: dict[str, str] = {}
    free = {path: runs[0] for path, runs in deleted.items() if runs}
    for new_path in sorted(added):
        runs = added[new_path]
        if not runs:
            continue
        shape = _structure(runs[0])
        candidates = [old for old, run in free.items() if _structure(run) == shape
                      and 2 * _shared_signatures(run, runs[0]) >= len(shape)]
        if not candidates:
            continue
        best = max(candidates, key=lambda old: (_shared_signatures(free[old], runs[0]),
                                                _name_likeness(old, new_path), old))
        pairs[new_path] = best
        del free[best]
    return pairs


def _structure(run: RunRecord) -> tuple[str, ...]:
    return tuple(layer.op_type for layer in run.layers)


def _shared_signatures(old: RunRecord, new: RunRecord) -> int:
    return sum(a.signature == b.signature for a, b in zip(old.layers, new.layers))


def _name_likeness(old: str, new: str) -> float:
    return difflib.SequenceMatcher(None, old.rsplit("/", 1)[-1], new.rsplit("/", 1)[-1]).ratio()
