"""Shapes as text (``--shape``, ``shapes:`` in roofgate.yaml): parse and print, nothing else.

Kept apart from ``gate.model.shapes`` (which binds shapes on ONNX graphs) so that
reading a config does not import onnx: commands that analyse nothing (``merge``,
``--help``) stay quick to start.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from gate.model.graph import INT64_MAX

MAX_DIM = INT64_MAX  # ONNX dims are int64
SHAPE_EXAMPLE = "images=1x3x640x640"

StaticShape = tuple[int, ...]


# ------------------------------------------------------------------ parsing

def parse_shape(text: str) -> StaticShape:
    """``"1x3x640x640"`` -> ``(1, 3, 640, 640)``; ``ValueError`` saying what is wrong otherwise."""
    parts = [part.strip() for part in text.strip().lower().split("x")]
    if not text.strip() or not all(re.fullmatch(r"-?[0-9]+", part) for part in parts):
        raise ValueError("not a shape: give positive sizes joined by 'x', e.g. 1x3x640x640")
    dims = tuple(int(part) for part in parts)
    for dim in dims:
        if dim < 1:
            raise ValueError(f"size {dim} is not positive: give the size you deploy (a whole "
                             "number, at least 1)")
        if dim > MAX_DIM:
            raise ValueError(f"size {dim} is beyond int64 (at most {MAX_DIM})")
    return dims


def parse_shape_binding(text: str) -> tuple[str, StaticShape]:
    """``"images=1x3x640x640"`` -> ``("images", (1, 3, 640, 640))``; ``ValueError`` otherwise.

    The shape follows the last ``=``, so an input name may itself hold one.
    """
    name, sep, shape = text.rpartition("=")
    if not sep or not name.strip():
        raise ValueError(f"'{text}': expected INPUT=SHAPE, e.g. {SHAPE_EXAMPLE}")
    try:
        return name.strip(), parse_shape(shape)
    except ValueError as exc:
        raise ValueError(f"'{text}': {exc}") from None


def shape_text(shape: Sequence[int | str]) -> str:
    """``(1, 3, 640, 640)`` -> ``"1x3x640x640"`` (the form ``--shape`` takes)."""
    return "x".join(str(d) for d in shape)
