"""Arrow arrays built from buffers are the arrays pyarrow.array builds from the same values.

The reference is pyarrow itself (``pyarrow.array(values, type=...)``); the layout being checked
is the Arrow columnar format's (validity bitmaps least significant bit first, int32 offsets).
"""

from __future__ import annotations

import math
from typing import Any

import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.sinks._arrow import column_array

_INT64 = st.integers(min_value=-(1 << 63), max_value=(1 << 63) - 1)
_CASES: list[tuple[pa.DataType, st.SearchStrategy[Any]]] = [
    (pa.int64(), _INT64),
    (pa.timestamp("ns", tz="UTC"), _INT64),
    (pa.float64(), st.floats(allow_nan=True) | st.integers(min_value=-(1 << 53), max_value=1 << 53)),
    (pa.bool_(), st.booleans()),
    (pa.string(), st.text()),
    (pa.binary(), st.binary()),
]


def _same(built: pa.Array, expected: pa.Array) -> None:
    assert built.type == expected.type and len(built) == len(expected)
    assert built.null_count == expected.null_count
    built.validate(full=True)
    if pa.types.is_timestamp(built.type):  # compare the integers (to_pylist makes datetimes)
        built, expected = built.view(pa.int64()), expected.view(pa.int64())
    for mine, theirs in zip(built.to_pylist(), expected.to_pylist(), strict=True):
        if isinstance(theirs, float) and math.isnan(theirs):
            assert isinstance(mine, float) and math.isnan(mine)
        else:
            assert mine == theirs and type(mine) is type(theirs)


@pytest.mark.parametrize(("arrow_type", "values"), _CASES, ids=[str(t) for t, _ in _CASES])
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_columns_equal_pyarrow_array(arrow_type: pa.DataType, values: st.SearchStrategy[Any], data: Any) -> None:
    # Lengths around a byte of the bitmap (7, 8, 9 values), nulls anywhere, or none at all.
    column = data.draw(st.lists(st.none() | values, max_size=40) | st.lists(values, min_size=7, max_size=9))
    _same(column_array(column, arrow_type), pa.array(column, type=arrow_type))


def test_all_null_and_empty_columns() -> None:
    for arrow_type, _ in _CASES:
        for column in ([], [None], [None] * 9):
            _same(column_array(column, arrow_type), pa.array(column, type=arrow_type))
