"""Arrow arrays from Python columns, built from their buffers.

``pyarrow.array(list)`` first asks whether the list is a pandas object, and to answer
it imports pandas (about 0.3 s, more than a small replay's whole run) even though no
pandas object is anywhere in sight. The sinks' columns are plain Python values of a
few known types, so they are laid out here the way the Arrow columnar format
specifies -- a validity bitmap (least significant bit first; omitted when nothing is
null), then fixed-width values, bit-packed booleans, or 32-bit offsets into UTF-8 or
binary data -- and handed to :meth:`pyarrow.Array.from_buffers`.
"""

from __future__ import annotations

import array
import itertools
from collections.abc import Sequence
from typing import Any, Final

import pyarrow as pa

# array module type codes of the fixed-width Arrow types (8 bytes each on every
# platform CPython supports: 'q' is long long, 'd' is double).
_FIXED: Final = {pa.types.is_int64: "q", pa.types.is_timestamp: "q", pa.types.is_float64: "d"}
_MAX_OFFSET: Final = (1 << 31) - 1  # Arrow's string and binary offsets are int32


def column_array(values: Sequence[Any], arrow_type: pa.DataType) -> pa.Array:
    """``values`` (Python objects, ``None`` for null) as an Arrow array of ``arrow_type``:
    the same array as ``pyarrow.array(values, type=arrow_type)`` for the types the sinks
    write (int64, timestamp, float64, bool, string, binary)."""
    length = len(values)
    validity, nulls = _validity(values)
    if pa.types.is_boolean(arrow_type):
        return pa.Array.from_buffers(arrow_type, length, [validity, _bits(values)], nulls)
    if pa.types.is_string(arrow_type) or pa.types.is_binary(arrow_type):
        return _variable_width(values, arrow_type, validity, nulls)
    for is_type, code in _FIXED.items():
        if is_type(arrow_type):
            data = array.array(code, values if not nulls else [0 if v is None else v for v in values])
            return pa.Array.from_buffers(arrow_type, length, [validity, pa.py_buffer(data)], nulls)
    return pa.array(values, type=arrow_type)  # a type the sinks do not write (yet)


def _validity(values: Sequence[Any]) -> tuple[pa.Buffer | None, int]:
    """The validity bitmap (None when no value is null) and the null count."""
    digits = "".join(["0" if v is None else "1" for v in reversed(values)])
    nulls = digits.count("0")
    return (_packed(digits, len(values)) if nulls else None), nulls


def _bits(flags: Sequence[Any]) -> pa.Buffer:
    """Truthy values as a bitmap, least significant bit first (Arrow's bit order)."""
    return _packed("".join(["1" if flag else "0" for flag in reversed(flags)]), len(flags))


def _packed(digits: str, length: int) -> pa.Buffer:
    # The last value's digit first: as one binary number, value i is bit i, and its
    # little-endian bytes are the bitmap. (Faster than setting bits one at a time.)
    return pa.py_buffer(int(digits or "0", 2).to_bytes((length + 7) // 8, "little"))


def _variable_width(values: Sequence[Any], arrow_type: pa.DataType, validity: pa.Buffer | None, nulls: int) -> pa.Array:
    if pa.types.is_string(arrow_type):
        encoded = [b"" if v is None else v.encode("utf-8") for v in values]
    else:
        encoded = [b"" if v is None else bytes(v) for v in values]
    offsets = array.array("i")
    total = sum(map(len, encoded))
    if total > _MAX_OFFSET:
        return pa.array(values, type=arrow_type)  # pyarrow splits it into chunks
    offsets.extend(itertools.accumulate(map(len, encoded), initial=0))
    data = pa.py_buffer(b"".join(encoded))
    return pa.Array.from_buffers(arrow_type, len(values), [validity, pa.py_buffer(offsets), data], nulls)
