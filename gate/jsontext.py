"""Deterministic JSON text: the one writer of roofgate's versioned documents.

Baseline snapshots (``gate.snapshot``) and JSON results (``gate.report.jsonout``) are
written here: keys sorted, floats rounded to ``FLOAT_DIGITS`` significant digits (never
``-0.0``; NaN and infinity refused), ASCII only, ``##`` defused, a final newline. The
same data always gives the same bytes.

Text layout: two-space indent, one layer per line. A container holding only plain
values (strings, numbers, booleans, null) is written on one line, and so is a *row*:
an object inside a list that holds no list of objects or lists (a layer with its
metrics, a finding, a layer change with its deltas); every other object has one key
per line and every other list one item per line. A row's text is put together from
memoised pieces (``_row_text``), any other one-line value is written by the C JSON
encoder in one call: no per-value work in Python but rounding floats and, for rows,
one step per value. The layout is whitespace only: readers parse JSON, so files
written with the earlier layout (one key per line down to the flat containers) read
the same, and changing it needs no version bump.

The text comes in pieces (``canonical_json_pieces``) that end at line ends, so a large
document goes to its file without being held whole; ``cyclic_gc_paused`` keeps the
cyclic collector from rescanning a large heap while documents are built, written or read.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from json.encoder import c_make_encoder, encode_basestring_ascii  # type: ignore[attr-defined]
from typing import Any

from gate.errors import InternalError
from gate.gcpause import cyclic_gc_paused
from gate.logsafe import defuse_json_markers

FLOAT_DIGITS = 12  # significant digits kept; the diff's float tolerance is below this


def canonical_json(data: Any) -> str:
    """``data`` as deterministic JSON text (see ``canonical_json_pieces``), in one string."""
    return "".join(canonical_json_pieces(data))


def canonical_json_pieces(data: Any) -> Iterator[str]:
    """``data`` as deterministic JSON text, in pieces of about ``PIECE_CHARS`` characters.

    Sorted keys, floats rounded to ``FLOAT_DIGITS`` significant digits (never
    ``-0.0``), two-space indent with one row per line (``_row``), final newline.
    Non-ASCII is written as ``\\uXXXX`` escapes, so any name (even one holding a
    lone surrogate, which UTF-8 cannot encode) is written and read back exactly;
    ``##`` is written ``#\\u0023`` so no line can carry a CI runner marker. Every
    piece ends at a line end, so no ``##`` spans two pieces, and a writer can
    stream a large document without holding its whole text.

    Raises InternalError on a NaN or infinity: records must never carry one, and
    JSON cannot (``NaN`` is not JSON).
    """
    return _pieces(_lines(data, "", "", "\n"))  # the tail of the document: its final newline


def canonical_json_share(data: Any, items: Sequence[Any], share: range, *, first: bool,
                         last: bool) -> Iterator[str]:
    """One part of ``canonical_json_pieces(data)`` cut at item boundaries of ``items``, a
    list inside ``data`` (found by identity; it must appear once), so the parts of one
    document can be rendered by several processes. Joined in order, the parts of
    ``even_shares(len(items), n)`` (the first with ``first``, the last with ``last``)
    are the whole document's text, byte for byte.

    The part writes ``items[share]``, and the text before the list if ``first``, after
    it if ``last``. No item outside the share is read, so a part's document may hold
    placeholders (None) there; at least one item of the list must be a container, or the
    list is written on one line (the first part then writes the whole document).
    """
    return _pieces(_part_lines(data, _Cut(items, share.start, share.stop), first, last))


def even_shares(count: int, parts: int) -> list[range]:
    """``range(count)`` cut into ``parts`` consecutive shares of nearly equal size (one
    share, maybe empty, when ``parts`` is below 1 or ``count`` is 0)."""
    parts = max(1, min(parts, count))
    bounds = [count * k // parts for k in range(parts + 1)]
    return [range(bounds[k], bounds[k + 1]) for k in range(parts)]


@dataclass(frozen=True, slots=True)
class _Cut:
    """The share ``items[start:stop]`` of the list ``items`` one part writes."""

    items: Sequence[Any]
    start: int
    stop: int


class _Marker(str):
    """Where the cut list's items begin and end in the lines of a document (never written;
    told apart from every line by identity)."""


_ENTER, _LEAVE = _Marker("enter"), _Marker("leave")


def _part_lines(data: Any, cut: _Cut, first: bool, last: bool) -> Iterator[str]:
    """The lines of one part: before the cut list only in the first, after it only in the
    last, and in between the part's share of the items."""
    before, inside, after = 0, 1, 2
    phase = before
    for line in _lines(data, "", "", "\n", cut):
        if line is _ENTER or line is _LEAVE:
            if (phase, line) not in ((before, _ENTER), (inside, _LEAVE)):
                raise InternalError("a document was cut at a list that appears in it twice")
            phase = inside if line is _ENTER else after
        elif phase == inside or (first if phase == before else last):
            yield line


def _pieces(lines: Iterator[str]) -> Iterator[str]:
    while True:
        with cyclic_gc_paused():
            piece = _next_piece(lines)
        if not piece:
            return
        yield piece


def _next_piece(lines: Iterator[str]) -> str:
    """The next piece of ``lines`` (defused), ending at a line end; "" after the last."""
    taken: list[str] = []
    size = 0
    try:
        for line in lines:
            taken.append(line)
            size += len(line)
            if size >= PIECE_CHARS:
                return defuse_json_markers("".join(taken))
    except ValueError as exc:  # the encoder refuses NaN and infinity (allow_nan=False)
        raise InternalError(f"cannot write JSON with a non-finite number ({exc})") from None
    return defuse_json_markers("".join(taken))


PIECE_CHARS = 1 << 20  # characters per piece of canonical_json_pieces (a bound, not a size)

# One encoder for every one-line value: keys sorted, ASCII only, NaN and infinity refused.
# ``JSONEncoder.encode`` builds a new C encoder per call (most of an audit's report time
# once); the C encoder built here once is called directly. Without a circular-reference
# check (markers None): the values written are trees built for the purpose.
_ENCODER = json.JSONEncoder(sort_keys=True, separators=(", ", ": "), ensure_ascii=True,
                            allow_nan=False)
_C_ENCODE = None if c_make_encoder is None else c_make_encoder(
    None, _ENCODER.default, encode_basestring_ascii, None, ": ", ", ", True, False, False)


def encode_one_line(value: Any) -> str:
    """``value`` as one line of JSON, exactly as ``_ENCODER.encode`` writes it (keys sorted,
    ASCII only, NaN and infinity refused with ValueError); floats as they are, unrounded."""
    if _C_ENCODE is None:  # pragma: no cover - an interpreter without the C accelerator
        return _ENCODER.encode(value)
    return "".join(_C_ENCODE(value, 0))


_NOT_FLAT = object()  # what _flat returns for a value that does not fit one line


def _lines(value: Any, indent: str, head: str, tail: str,
           cut: _Cut | None = None) -> Iterator[str]:
    """The lines of ``value`` at ``indent``: ``head`` before its first line (its key, or
    nothing), ``tail`` after its last (a comma and a newline, or a newline); so every
    piece yielded ends in a newline.

    Layout, one layer per line: a scalar, a container holding only scalars, and a row
    (``_row``: an object in a list that holds no list of containers) take one line (a
    row's text built by ``_row_text``, the others written by the C encoder in one call);
    any other object has one key per line and any other list one item per line.

    ``cut``: of the list ``cut.items`` only the share of one part is written, between
    the markers ``_ENTER`` and ``_LEAVE`` (``canonical_json_parts``).
    """
    flat = _flat(value)
    if flat is not _NOT_FLAT:
        yield f"{indent}{head}{encode_one_line(flat)}{tail}"
        return
    inner = indent + "  "
    if isinstance(value, Mapping):
        items = _str_keys(value)
        yield f"{indent}{head}{{\n"
        last = len(items) - 1
        for index, key in enumerate(sorted(items)):
            yield from _lines(items[key], inner, encode_one_line(key) + ": ",
                              ",\n" if index < last else "\n", cut)
        yield f"{indent}}}{tail}"
        return
    yield f"{indent}{head}[\n"
    last = len(value) - 1
    window, cut_here = range(len(value)), False
    if cut is not None and value is cut.items:
        window, cut_here = range(cut.start, cut.stop), True
        yield _ENTER
    for index in window:
        item = value[index]
        separator = ",\n" if index < last else "\n"
        text = _row_text(item) if type(item) is dict else None
        if text is _UNUSUAL:  # a row holding a value of another type: the general way
            row = _row(item)
            text = None if row is None else encode_one_line(row)
        if text is not None:
            yield f"{inner}{text}{separator}"
        else:
            yield from _lines(item, inner, "", separator, cut)
    if cut_here:
        yield _LEAVE
    yield f"{indent}]{tail}"


# --- rows as text ------------------------------------------------------------------------
# A row (a layer: 13 values and 24 metrics) is the bulk of a large document. Its text is
# built here from memoised pieces, each exactly what the encoder writes (the key with its
# separator, the rounded float's repr, the C string escaper's output), in half the time
# of rounding a copy and encoding it. Only plain types: anything else is _UNUSUAL and goes
# the general way (``_row`` and the C encoder), so both give the same bytes.

_UNUSUAL = object()
_KEY_TEXTS: dict[str, str] = {}  # key -> '"key": '
_FLOAT_TEXTS: dict[float, str] = {}  # float -> the text of its rounded value
_TEXT_MEMO_MAX = 1 << 16  # entries, then a memo starts over (bounded memory)


def _row_text(value: dict[Any, Any]) -> Any:
    """The one-line text of the object ``value`` (keys sorted, floats rounded); None if it
    holds a list of containers (it is not a row); ``_UNUSUAL`` if it holds another type."""
    if not set(map(type, value)) <= _STR_TYPE:
        return _UNUSUAL
    parts = []
    key_text, float_text = _KEY_TEXTS.get, _FLOAT_TEXTS.get
    for key in sorted(value):
        item = value[key]
        kind = type(item)
        if kind is str:
            text = encode_basestring_ascii(item)
        elif kind is float:
            text = float_text(item) or _float_text(item)
        elif kind is int:
            text = int.__repr__(item)
        elif kind is bool:
            text = "true" if item else "false"
        elif item is None:
            text = "null"
        elif kind is dict or kind is list or kind is tuple:
            text = _row_text(item) if kind is dict else _flat_list_text(item)
            if text is None or text is _UNUSUAL:
                return text
        else:
            return _UNUSUAL
        parts.append((key_text(key) or _key_text(key)) + text)
    return "{" + ", ".join(parts) + "}"


def _flat_list_text(value: list[Any] | tuple[Any, ...]) -> Any:
    """The one-line text of a list of plain values; None if it holds a container,
    ``_UNUSUAL`` if it holds another type."""
    parts = []
    float_text = _FLOAT_TEXTS.get
    for item in value:
        kind = type(item)
        if kind is str:
            parts.append(encode_basestring_ascii(item))
        elif kind is float:
            parts.append(float_text(item) or _float_text(item))
        elif kind is int:
            parts.append(int.__repr__(item))
        elif kind is bool:
            parts.append("true" if item else "false")
        elif item is None:
            parts.append("null")
        elif kind is dict or kind is list or kind is tuple:
            return None
        else:
            return _UNUSUAL
    return "[" + ", ".join(parts) + "]"


def _float_text(value: float) -> str:
    """The text the encoder writes for ``value`` rounded (never "-0.0"); ValueError, as the
    encoder raises, for a NaN or infinity."""
    rounded = float(f"{value:.{FLOAT_DIGITS}g}") or 0.0  # "or": -0.0 is false
    if not math.isfinite(rounded):
        raise ValueError(f"Out of range float values are not JSON compliant: {value!r}")
    if len(_FLOAT_TEXTS) >= _TEXT_MEMO_MAX:
        _FLOAT_TEXTS.clear()
    text = _FLOAT_TEXTS[value] = float.__repr__(rounded)
    return text


def _key_text(key: str) -> str:
    if len(_KEY_TEXTS) >= _TEXT_MEMO_MAX:
        _KEY_TEXTS.clear()
    text = _KEY_TEXTS[key] = encode_basestring_ascii(key) + ": "
    return text


def _flat(value: Any) -> Any:
    """A rounded copy of ``value`` if it is a scalar or a container of scalars only, else
    ``_NOT_FLAT`` (``value`` itself when nothing needs rounding: the encoder only reads it).

    The type checks run in C (``set(map(type, ...))``) and only floats are visited in
    Python, since most values of a layer are ints and strings. A value of a type the fast
    path does not know (a subclass, another mapping) goes through ``_rounded``.
    """
    kind = type(value)
    if kind is dict:
        if not set(map(type, value)) <= _STR_TYPE:
            value = {str(key): item for key, item in value.items()}
        kinds = set(map(type, value.values()))
        if kinds <= _SCALAR_TYPES:
            if float not in kinds:
                return value
            get = _ROUNDED.get
            return {key: ((get(item) or _round_float(item)) if item else 0.0)
                    if type(item) is float else item for key, item in value.items()}
    elif kind is list or kind is tuple:
        kinds = set(map(type, value))
        if kinds <= _SCALAR_TYPES:
            if float not in kinds:
                return value
            get = _ROUNDED.get
            return [((get(item) or _round_float(item)) if item else 0.0)
                    if type(item) is float else item for item in value]
    elif kind is float:
        return _round_float(value) if value else 0.0
    elif kind in _SCALAR_TYPES:
        return value
    elif not isinstance(value, (Mapping, list, tuple)):
        return _rounded(value)  # an unusual scalar (a subclass): as the writer always did
    else:
        kinds = set(map(type, value.values() if isinstance(value, Mapping) else value))
    if kinds.isdisjoint(_CONTAINER_TYPES) and _holds_only_scalars(value):
        return _rounded(value)  # scalars of unusual types (subclasses)
    return _NOT_FLAT


def _row(value: dict[Any, Any]) -> dict[str, Any] | None:
    """A rounded copy of the object ``value`` if it holds no list of containers (it then
    takes one line), else None.

    Such an object in a list is a row: a layer with its metrics, a finding, a layer
    change with its deltas. Keeping each on one line keeps the file diffable (one line
    per layer). The general way to write a row (``_row_text`` is the fast one); also
    the reference it is tested against.
    """
    if set(map(type, value.values())) <= _SCALAR_TYPES:
        return _flat(value)  # type: ignore[no-any-return]
    out = {}
    for key, item in value.items():
        kind = type(item)
        if kind is dict:
            item = _row(item)
            if item is None:
                return None
        elif kind is float:
            item = (_ROUNDED.get(item) or _round_float(item)) if item else 0.0
        elif kind not in _SCALAR_TYPES:
            item = _flat(item)
            if item is _NOT_FLAT:
                return None
        out[key if type(key) is str else str(key)] = item
    return out


_SCALAR_TYPES = frozenset({str, int, float, bool, type(None)})
_STR_TYPE = frozenset({str})
_CONTAINER_TYPES = frozenset({dict, list, tuple})


# Memo of rounded floats: formatting costs most of the rounding, and a result repeats
# many figures (every layer of a repeated block). Keys are the floats themselves (only
# 0.0 and -0.0 compare equal while differing, and zeros never come here).
_ROUNDED: dict[float, float] = {}
_ROUNDED_MAX = 1 << 16  # entries, then the memo starts over (bounded memory)


def _round_float(value: float) -> float:
    """``value`` rounded to FLOAT_DIGITS significant digits; never -0.0 (a NaN or infinity
    passes through: the encoder refuses it)."""
    rounded = float(f"{value:.{FLOAT_DIGITS}g}")  # never 0: zeros are handled before
    if len(_ROUNDED) >= _ROUNDED_MAX:
        _ROUNDED.clear()
    _ROUNDED[value] = rounded
    return rounded


def _holds_only_scalars(value: Any) -> bool:
    items = value.values() if isinstance(value, Mapping) else value
    return not any(isinstance(item, (Mapping, list, tuple)) for item in items)


def _str_keys(value: Mapping[Any, Any]) -> dict[str, Any]:
    if all(type(key) is str for key in value):
        return value  # type: ignore[return-value]
    return {str(key): item for key, item in value.items()}


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
