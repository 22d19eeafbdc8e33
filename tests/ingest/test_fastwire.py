"""The direct decoder accepts a record only when it equals what the validator builds."""

from __future__ import annotations

import math
from typing import Any

import msgpack
from factories import T0, tick
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.ingest.fastwire import INCOMPLETE, NOT_SIMPLE, WireScanner
from barsmith.ingest.ticks import MalformedTickError, decode_tick

numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=64),
    st.floats(width=32),
    st.integers(-(2**63), 2**64 - 1),
    st.none(),
    st.booleans(),
    st.text(max_size=3),
)
symbols = st.one_of(st.sampled_from(["FENWORTH.KMX", "MARROWAY.KMX"]), st.text(max_size=70), st.integers(0, 5))


@st.composite
def records(draw: st.DrawFn) -> dict[str, Any]:
    rec: dict[str, Any] = {}
    if draw(st.integers(0, 9)):
        rec["sym"] = draw(symbols)
    if draw(st.integers(0, 9)):
        rec["ts"] = draw(st.one_of(st.integers(T0 - 5, T0 + 5), st.integers(-3, 2**64 - 1), st.booleans()))
    if draw(st.integers(0, 9)):
        rec["seq"] = draw(st.one_of(st.integers(0, 300), st.integers(-3, 2**64 - 1), st.floats()))
    if draw(st.integers(0, 9)):
        rec["kind"] = draw(st.sampled_from(["delta", "snapshot", "refresh", 3]))
    for key in ("bid_px", "bid_qty", "ask_px", "ask_qty", "trade_px", "trade_qty"):
        if draw(st.booleans()):
            rec[key] = draw(numbers)
    if draw(st.integers(0, 19)) == 0:
        rec["extra"] = 1
    return rec


def same(a: Any, b: Any) -> bool:
    return a == b or (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b))


@settings(max_examples=3000, deadline=None)
@given(records(), st.booleans())
def test_fast_path_agrees_with_the_validator(rec: dict[str, Any], single_float: bool) -> None:
    try:
        data = msgpack.packb(rec, use_single_float=single_float)  # float32 (0xca) encodings too
    except OverflowError:
        data = msgpack.packb(rec)
    scanner = WireScanner()
    end = scanner.scan(data, 0)
    try:
        expected = decode_tick(msgpack.unpackb(data, strict_map_key=False))
    except MalformedTickError:
        assert end == NOT_SIMPLE
        return
    if end == NOT_SIMPLE:
        return  # allowed: the general path handles it
    assert end == len(data)
    got = scanner.tick
    assert got is not None
    for name in Tick_fields:
        assert same(getattr(got, name), getattr(expected, name)), name


Tick_fields = (
    "sym", "ts", "seq", "is_snapshot", "present", "bid_px", "bid_qty", "ask_px", "ask_qty", "trade_px", "trade_qty"
)  # fmt: skip


def test_cut_records_are_incomplete_not_wrong() -> None:
    data = msgpack.packb(tick(bid_px=1.5, bid_qty=2.0, trade_px=1.5, trade_qty=1.0))
    scanner = WireScanner()
    assert scanner.scan(data, 0) == len(data)
    for cut in range(1, len(data)):
        assert scanner.scan(data[:cut], 0) == INCOMPLETE
