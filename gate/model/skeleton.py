"""A model file's bytes without its weight values, read from the protobuf wire format.

Why: roofgate never reads weights, yet parsing a file with 100 MB of inline
weights copied them twice (the file's bytes, then the parsed message) before
the loader cleared them. Here the file is mapped (``mmap``) and the main graph's
initializers are scanned field by field; the values of each initializer that
``gate.model.convert.drop_tensor_values`` would clear (more than a few elements,
stored inline) are left out, so their pages are never read and the message
protobuf parses holds dims, dtypes and names only. Everything else is copied
byte for byte, so the parsed model equals the full one with those values
cleared.

Only well-formed input takes this path: anything unexpected in the wire format
(a malformed varint, a length past the end, a group) returns None and the
loader parses the file as it is, where protobuf reports the problem.
"""

from __future__ import annotations

import mmap
from collections.abc import Callable

from gate.model.constants import CONST_VALUE_LIMIT

_LEN, _VARINT, _FIXED64, _FIXED32 = 2, 0, 1, 5
_MODEL_GRAPH = 7  # ModelProto.graph
_GRAPH_INITIALIZER = 5  # GraphProto.initializer
_NODE_KEY = (1 << 3) | 2  # GraphProto.node, length-delimited
_TENSOR_DIMS, _TENSOR_DATA_TYPE, _TENSOR_DATA_LOCATION = 1, 2, 14
# float_data, int32_data, string_data, int64_data, raw_data, double_data, uint64_data
_TENSOR_VALUES = frozenset({4, 5, 6, 7, 9, 10, 11})
_SHAPE_DTYPES = frozenset({6, 7})  # INT32, INT64: small ones may be shapes (kept longer)
_EXTERNAL = 1  # TensorProto.EXTERNAL


class _NotPlain(Exception):
    """The bytes are not the well-formed protobuf this reader handles."""


def file_without_weights(path: str) -> bytes | None:
    """The bytes of the model file at ``path`` without inline weight values, or None
    (unreadable here, nothing to leave out, or not well-formed: parse the file itself)."""
    try:
        with open(path, "rb") as handle, \
                mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as mapped:
            if hasattr(mapped, "madvise"):  # reads jump over the weights
                mapped.madvise(mmap.MADV_RANDOM)
            return without_weights(mapped)
    except (OSError, ValueError, BufferError):
        return None


def without_weights(buffer: bytes | mmap.mmap) -> bytes | None:
    """``buffer`` (a serialized ModelProto) without inline weight values, or None."""
    view = memoryview(buffer)
    try:
        return _model(view)
    except (_NotPlain, IndexError):
        return None
    finally:
        view.release()


def _varint(view: memoryview, pos: int, end: int) -> tuple[int, int]:
    result = shift = 0
    while True:
        if pos >= end or shift > 63:
            raise _NotPlain
        byte = view[pos]
        pos += 1
        result |= (byte & 0x7F) << shift
        if byte < 0x80:
            return result, pos
        shift += 7


def _encode_varint(value: int) -> bytes:
    out = bytearray()
    while value > 0x7F:
        out.append((value & 0x7F) | 0x80)
        value >>= 7
    out.append(value)
    return bytes(out)


def _field(view: memoryview, pos: int, end: int) -> tuple[int, int, int, int, int]:
    """(field number, wire type, start of the value, end of the value, end of the field)."""
    key, pos = _varint(view, pos, end)
    number, wire = key >> 3, key & 7
    if wire == _VARINT:
        _, after = _varint(view, pos, end)
        return number, wire, pos, after, after
    if wire == _LEN:
        length, start = _varint(view, pos, end)
        stop = start + length
        if stop > end:
            raise _NotPlain
        return number, wire, start, stop, stop
    size = {_FIXED64: 8, _FIXED32: 4}.get(wire)
    if size is None or pos + size > end:
        raise _NotPlain  # groups (3, 4) and unknown wire types
    return number, wire, pos, pos + size, pos + size


def _model(view: memoryview) -> bytes | None:
    return _rewritten(view, 0, len(view), _MODEL_GRAPH, _graph)


def _graph(view: memoryview, begin: int, end: int) -> bytes | None:
    return _rewritten(view, begin, end, _GRAPH_INITIALIZER, _tensor, fast_key=_NODE_KEY)


def _rewritten(view: memoryview, begin: int, end: int, number: int,
               rewrite: Callable[[memoryview, int, int], bytes | None],
               fast_key: int = -1) -> bytes | None:
    """The message ``view[begin:end]`` with each length-delimited field ``number`` replaced
    by ``rewrite(view, start, stop)`` (None: kept as it is); None when nothing changed.

    A field whose key byte is ``fast_key`` (a graph's nodes: most of its bytes) is
    jumped over without the general field reader when its length fits two bytes.
    """
    pieces: list[bytes | memoryview] = []
    copied = pos = begin
    changed = False
    while pos < end:
        if view[pos] == fast_key:
            size = view[pos + 1]
            if size < 0x80:
                pos += 2 + size
                continue
            high = view[pos + 2]
            if high < 0x80:
                pos += 3 + ((size & 0x7F) | (high << 7))
                continue
        field, wire, start, stop, pos = _field(view, pos, end)
        if field == number and wire == _LEN:
            value = rewrite(view, start, stop)
            if value is not None:
                pieces += _spliced(view, copied, start, value)
                copied, changed = stop, True
    if pos != end:
        raise _NotPlain  # a field jumped over ran past the message's end
    if not changed:
        return None
    pieces.append(view[copied:end])
    return b"".join(pieces)


def _spliced(view: memoryview, copied: int, start: int,
             value: bytes) -> list[bytes | memoryview]:
    """The bytes from ``copied`` up to a length-delimited field whose value starts at
    ``start``, then that field's new length and new ``value`` (the caller skips the old)."""
    return [view[copied:start - _length_size(view, start)], _encode_varint(len(value)), value]


def _length_size(view: memoryview, start: int) -> int:
    """Bytes of the length varint that ends just before ``start``."""
    size = 1
    while start - size - 1 >= 0 and view[start - size - 1] >= 0x80:
        size += 1
    return size


def _tensor(view: memoryview, begin: int, end: int) -> bytes | None:
    """The tensor without its values when they would be dropped, else None (kept as is)."""
    dims: list[int] = []
    data_type = location = 0
    values: list[tuple[int, int]] = []  # (field start, field end) of value fields
    pos = begin
    while pos < end:
        field_start = pos
        number, wire, start, stop, pos = _field(view, pos, end)
        if number == _TENSOR_DIMS:
            dims += _signed_varints(view, start, stop) if wire == _LEN \
                else [_signed(_varint(view, start, stop)[0])]
        elif number == _TENSOR_DATA_TYPE and wire == _VARINT:
            data_type = _varint(view, start, stop)[0]
        elif number == _TENSOR_DATA_LOCATION and wire == _VARINT:
            location = _varint(view, start, stop)[0]
        elif number in _TENSOR_VALUES:
            values.append((field_start, pos))
    if not values or location == _EXTERNAL or _kept(dims, data_type):
        return None
    pieces, copied = [], begin
    for field_start, field_end in values:
        pieces.append(view[copied:field_start])
        copied = field_end
    pieces.append(view[copied:end])
    return b"".join(pieces)


def _kept(dims: list[int], data_type: int) -> bool:
    """The rule of ``gate.model.convert.drop_tensor_values``: small tensors keep values."""
    count = 1
    for dim in dims:
        count *= dim
    return count <= CONST_VALUE_LIMIT or (data_type in _SHAPE_DTYPES
                                          and count <= 64 * CONST_VALUE_LIMIT)


def _signed(value: int) -> int:
    return value - (1 << 64) if value >= 1 << 63 else value


def _signed_varints(view: memoryview, pos: int, end: int) -> list[int]:
    out = []
    while pos < end:
        value, pos = _varint(view, pos, end)
        out.append(_signed(value))
    return out
