"""The record scanner accepts a record only when it equals what the validator builds."""

from __future__ import annotations

import math
from typing import Any

import msgpack
import pytest
from factories import T0, tick
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.ingest.fastwire import INCOMPLETE, NOT_SIMPLE, new_scanner
from barsmith.ingest.framing import RepeatedKeyError, unpack_value
from barsmith.ingest.ticks import MalformedTickError, Tick, decode_tick

# The scanner is C; a checkout tested without building it has none (CI builds it and
# test_public_api checks that it is there).
pytestmark = pytest.mark.skipif(new_scanner() is None, reason="the C record scanner is not built")


SHARED = new_scanner()


def scanner() -> Any:
    made = new_scanner()
    assert made is not None
    return made


numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=64),
    st.floats(width=32),
    st.integers(-(2**63), 2**64 - 1),
    st.none(),
    st.booleans(),
    st.text(max_size=3),
)
symbols = st.one_of(st.sampled_from(["FENWORTH~KESMOOR", "MARROWAY~KESMOOR"]), st.text(max_size=70), st.integers(0, 5))


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
    if draw(st.integers(0, 3)) == 0:
        # Depth levels, usually without the top-of-book fields they must not be mixed with.
        if draw(st.integers(0, 4)):
            for key in ("bid_px", "bid_qty", "ask_px", "ask_qty"):
                rec.pop(key, None)
        for key in ("bids", "asks"):
            if draw(st.booleans()):
                rec[key] = draw(levels)
    if draw(st.integers(0, 19)) == 0:
        rec["extra"] = 1
    return rec


prices = st.one_of(st.sampled_from([10.0, 10.5, 11.0, 0.0, -1.0, 9]), numbers)
level = st.one_of(
    st.lists(st.one_of(prices, st.sampled_from([0.0, -0.0, 1.0, 2.5, 3])), min_size=2, max_size=2),
    st.lists(prices, max_size=3),
    numbers,
)
# Long sides (array 16 on the wire, past the stack buffer and the pairwise price check),
# valid pairs whose prices come from a small set, so some repeat.
long_side = st.lists(
    st.tuples(st.integers(1, 120).map(lambda n: n * 0.5), st.sampled_from([0.0, 1.0, 2.5, 3])).map(list),
    min_size=15,
    max_size=90,
)
levels = st.one_of(st.lists(level, max_size=17), long_side, numbers)


def same(a: Any, b: Any) -> bool:
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(
            same(x, y) and all(math.copysign(1.0, u) == math.copysign(1.0, v) for u, v in zip(x, y, strict=True))
            for x, y in zip(a, b, strict=True)
        )
    return a == b or (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b))


@settings(max_examples=3000, deadline=None)
@given(records(), st.booleans())
def test_fast_path_agrees_with_the_validator(rec: dict[str, Any], single_float: bool) -> None:
    try:
        data = msgpack.packb(rec, use_single_float=single_float)  # float32 (0xca) encodings too
    except OverflowError:  # a double beyond float32's range
        single_float = False
        data = msgpack.packb(rec)
    scan = SHARED  # one scanner for every example: its symbol cache is exercised too
    end = scan.scan_record(data, 0)
    try:
        expected = decode_tick(msgpack.unpackb(data, strict_map_key=False))
    except MalformedTickError:
        assert end == NOT_SIMPLE
        return
    if end == NOT_SIMPLE:
        return  # allowed: the general path handles it
    assert end == len(data)
    assert_same_tick(scan.tick, expected)
    # Alone in a value, and as a batch of two, it decodes the same.
    assert_same_tick(scan.scan_value(data), expected)
    batch = scan.scan_value(msgpack.packb([rec, rec], use_single_float=single_float))
    assert type(batch) is list and len(batch) == 2
    for item in batch:
        assert_same_tick(item, expected)


def assert_same_tick(got: Tick | None, expected: Tick) -> None:
    assert type(got) is Tick
    for name in Tick_fields:
        assert same(getattr(got, name), getattr(expected, name)), name
        # Bit for bit: -0.0 stays -0.0.
        if isinstance(getattr(expected, name), float):
            assert math.copysign(1.0, getattr(got, name)) == math.copysign(1.0, getattr(expected, name)), name


Tick_fields = (
    "sym", "ts", "seq", "is_snapshot", "present", "bid_px", "bid_qty", "ask_px", "ask_qty", "trade_px", "trade_qty",
    "bids", "asks",
)  # fmt: skip


def test_cut_records_are_incomplete_not_wrong() -> None:
    data = msgpack.packb(tick(bid_px=1.5, bid_qty=2.0, trade_px=1.5, trade_qty=1.0))
    scan = scanner()
    assert scan.scan_record(data, 0) == len(data)
    for cut in range(1, len(data)):
        assert scan.scan_record(data[:cut], 0) == INCOMPLETE
        assert scan.scan_value(data[:cut]) is None
    batch = msgpack.packb([msgpack.unpackb(data)] * 3)
    assert scan.scan_record(batch, 0) == len(batch)
    for cut in range(1, len(batch)):
        assert scan.scan_record(batch[:cut], 0) == INCOMPLETE


def test_trailing_bytes_and_empty_batches_take_the_general_path() -> None:
    data = msgpack.packb(tick(trade_px=1.5, trade_qty=1.0))
    scan = scanner()
    assert scan.scan_value(data + b"\xc0") is None
    assert scan.scan_value(msgpack.packb([])) is None
    assert scan.scan_record(msgpack.packb([]), 0) == NOT_SIMPLE
    # A valid record after some bytes: the position is honoured.
    assert scan.scan_record(b"\x00" + data, 1) == len(data) + 1


def test_constants_agree_with_the_extension() -> None:
    from barsmith.ingest import _wirescan

    assert (_wirescan.NOT_SIMPLE, _wirescan.INCOMPLETE) == (NOT_SIMPLE, INCOMPLETE)


def test_doubles_decode_bit_for_bit() -> None:
    """Binary64 values at the edges of the range (IEEE 754 limits, common practice)
    come out bit-identical to the validator's (msgpack's) decoding."""
    edges = [0.0, -0.0, 5e-324, 2.2250738585072009e-308, 2.2250738585072014e-308, 1.7976931348623157e308]
    edges += [0.1, 1.0, 3.0e-5, 123456.789, 2.0**52 + 1, 2.0**53]
    scan = scanner()
    for value in edges:
        rec = tick(trade_px=1.0, trade_qty=1.0, bid_qty=value)
        data = msgpack.packb(rec)
        assert scan.scan_record(data, 0) == len(data), value
        assert_same_tick(scan.tick, decode_tick(msgpack.unpackb(data)))
    for value in (-1.5, math.inf, -math.inf, math.nan):  # the validator rejects these
        assert scan.scan_record(msgpack.packb(tick(trade_px=1.0, trade_qty=1.0, bid_qty=value)), 0) == NOT_SIMPLE


def test_symbol_cache_gives_each_symbol_its_own_text() -> None:
    """Many symbols through one scanner (its cache has fewer slots than symbols)."""
    scan = scanner()
    names = [f"SYM{i:04d}~KESMOOR" for i in range(2000)] + ["É~KESMOOR", "Ω" * 64]
    for _ in range(2):
        for name in names:
            data = msgpack.packb(tick(sym=name))
            assert scan.scan_record(data, 0) == len(data)
            assert scan.tick.sym == name
    too_long = msgpack.packb(tick(sym="Ω" * 65))
    assert scan.scan_record(too_long, 0) == NOT_SIMPLE


def test_a_repeated_key_takes_the_general_path() -> None:
    # msgpack checks every occurrence of a key (here an overwritten sym that is not
    # UTF-8, which the general path refuses), so the scanner must not take the last one.
    head = msgpack.packb(tick(ts=T0, seq=1))
    body = head[1:]  # the four pairs without the map header
    bad_sym = b"\xa3sym\xa2K\x85"  # "sym": two bytes, not UTF-8
    record = bytes([0x85]) + bad_sym + body
    with pytest.raises(ValueError):
        msgpack.unpackb(record, raw=False)
    assert scanner().scan_record(record, 0) == NOT_SIMPLE
    assert scanner().scan_value(record) is None
    # A repeated key with valid values is refused too, by the general path: each key once.
    twice = bytes([0x85]) + b"\xa3seq\x07" + body
    assert scanner().scan_record(twice, 0) == NOT_SIMPLE
    with pytest.raises(RepeatedKeyError, match="'seq' twice"):
        unpack_value(twice)


def _scan_loop(
    scan: Any, data: bytes, pos: int, count: int, max_bytes: int, base: int
) -> tuple[list[Any], list[int], tuple[int, int, int]]:
    """What scan_records must do, one scan_record at a time (the reader's former loop)."""
    records: list[Any] = []
    positions: list[int] = []
    result, last = INCOMPLETE, -1
    while pos < len(data) and len(records) < count:
        result = scan.scan_record(data, pos)
        if result < 0 or result - pos > max_bytes:
            break
        records.append(scan.tick if scan.batch is None else scan.batch)
        positions.append(base + pos)
        last, pos = pos, result
    return records, positions, (pos, result, last)


# Mostly records of the usual shape (the scanner takes them), some that are not.
_usual = st.integers(1, 50).map(lambda n: tick(seq=n, bid_px=1.5 * n, bid_qty=2.0))


@settings(max_examples=500, deadline=None)
@given(
    st.lists(st.one_of(_usual, st.lists(_usual, min_size=1, max_size=3), records()), max_size=8),
    st.integers(0, 9),
    st.integers(0, 400),
    st.integers(0, 20),
)
def test_scan_records_is_the_loop_of_scan_record(recs: list[Any], count: int, max_bytes: int, cut: int) -> None:
    data = b"".join(msgpack.packb(r) for r in recs)
    data = data[: len(data) - cut] if cut < len(data) else data  # a record cut short, maybe
    expected_records, expected_positions, expected = _scan_loop(scanner(), data, 0, count, max_bytes, 1_000)
    records_out: list[Any] = []
    positions_out: list[int] = []
    got = scanner().scan_records(data, 0, count, max_bytes, 1_000, records_out, positions_out)
    assert got == expected and positions_out == expected_positions
    flat = [r if isinstance(r, list) else [r] for r in records_out]
    flat_expected = [r if isinstance(r, list) else [r] for r in expected_records]
    for mine, theirs in zip(flat, flat_expected, strict=True):
        assert len(mine) == len(theirs)
        for a, b in zip(mine, theirs, strict=True):
            assert all(same(getattr(a, f), getattr(b, f)) for f in Tick_fields)


def test_scanned_ticks_are_left_out_of_the_cyclic_collector() -> None:
    # A tick holds only a str, ints, floats, a bool and Nones: it cannot be in a cycle.
    import gc

    data = msgpack.packb(tick(bid_px=1.5, bid_qty=2.0))
    scan = scanner()
    assert scan.scan_record(data, 0) == len(data)
    assert scan.tick is not None and not gc.is_tracked(scan.tick)
    batch = scan.scan_value(msgpack.packb([msgpack.unpackb(data)] * 2))
    assert isinstance(batch, list) and not any(gc.is_tracked(t) for t in batch)


@pytest.mark.parametrize(
    ("fields", "fast"),
    [
        ({"kind": "snapshot", "bids": [[10.0, 1.0], [9, 2]], "asks": []}, True),
        ({"bids": [[10.0, 0.0]], "asks": [[10.5, -0.0]], "trade_px": 10.0, "trade_qty": 1.0}, True),
        ({"kind": "snapshot", "bids": [[10.0, 0.0]]}, False),  # a snapshot level needs a quantity
        ({"bids": [[10.0, 1.0], [10.0, 2.0]]}, False),  # a price twice
        ({"bids": [[10.0, 1.0]], "ask_px": 10.5}, False),  # mixed book forms
        ({"bids": [[10.0 + i, 1.0] for i in range(16)]}, True),  # array 16 on the wire
        ({"bids": [[10.0 + i, 1.0] for i in range(65)]}, True),  # past the stack buffer
        ({"bids": [[10.0 + i, 1.0] for i in range(4096)]}, True),  # the most levels taken here
        ({"bids": [[10.0 + i, 1.0] for i in range(4097)]}, False),  # beyond: the general path
        ({"bids": [[10.0 + i, 1.0] for i in range(17)] + [[12.0, 5.0]]}, False),  # a price twice, sort-checked
        ({"bids": [[10.0 + i, 1.0] for i in range(70)] + [[10.0, 5.0]]}, False),  # the same, heap buffer
        ({"kind": "snapshot", "asks": [[10.0 + i, float(i % 40)] for i in range(80)]}, False),  # a qty 0
    ],
)
def test_depth_levels_on_the_fast_path(fields: dict[str, Any], fast: bool) -> None:
    rec = tick(**fields)
    data = msgpack.packb(rec)
    scan = scanner()
    end = scan.scan_record(data, 0)
    assert (end == len(data)) is fast
    if fast:
        assert_same_tick(scan.tick, decode_tick(msgpack.unpackb(data)))
