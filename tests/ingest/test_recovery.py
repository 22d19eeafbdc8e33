"""Recovery after damage: valid records with hostile byte spans between them.

The property: every valid record that does not overlap a damaged span is recovered,
in order, at its own offset; no tick is made up; every damaged byte is accounted for
by a reject or by a malformed record; and a span that does not begin with a whole
msgpack value gives exactly one reject, which covers it and nothing valid. Spans are
aimed at the edges of the rules: container headers that could swallow the records
after them, prefixes of valid records, bogus huge length headers, single bytes, at the
start and the end of the input, before batches.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from typing import Any

import msgpack
import pytest
from factories import T0
from hostile import CONTAINER_HEADERS, holds_a_tick
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from barsmith.ingest.fastwire import new_scanner
from barsmith.ingest.framing import FrameReader, FramingReject
from barsmith.ingest.ticks import MalformedTickError, RejectReason, Tick, decode_tick

SCANNER_MODES = [False, True] if new_scanner() is not None else [False]


@dataclass
class Piece:
    data: bytes
    valid: bool  # a valid record (else a damaged span)


def _ticks_strategy() -> st.SearchStrategy[dict[str, Any]]:
    @st.composite
    def one(draw: st.DrawFn) -> dict[str, Any]:
        rec: dict[str, Any] = {
            "sym": draw(st.sampled_from(["FENWORTH~KESMOOR", "MARROWAY~KESMOOR", "Q"])),
            "ts": T0 + draw(st.integers(0, 10**12)),
            "seq": draw(st.integers(0, 2**40)),
            "kind": draw(st.sampled_from(["delta", "snapshot"])),
        }
        for key in ("bid_px", "ask_px", "bid_qty", "ask_qty"):
            if draw(st.booleans()):
                rec[key] = draw(st.one_of(st.none(), st.floats(0.5, 1e6), st.integers(1, 10**6)))
        if draw(st.booleans()):
            rec["trade_px"] = draw(st.floats(0.5, 1e6))
            rec["trade_qty"] = draw(st.floats(0.5, 1e4))
        if draw(st.integers(0, 9)) == 0:
            rec["venue_flags"] = draw(st.sampled_from([["x"], 7, "odd", {"lvl": [1.5, 2]}]))  # unusual but valid
        decode_tick(rec)
        return rec

    return one()


TICKS = _ticks_strategy()
VALID = st.one_of(
    TICKS.map(lambda t: msgpack.packb(t)),
    st.lists(TICKS, min_size=2, max_size=4).map(lambda ts: msgpack.packb(ts)),
)


@st.composite
def spans(draw: st.DrawFn, records: list[bytes]) -> bytes:
    kind = draw(st.sampled_from(["random", "container", "prefix", "huge", "single"]))
    if kind == "random":
        return draw(st.binary(min_size=1, max_size=64))
    if kind == "single":
        return draw(st.binary(min_size=1, max_size=1))
    if kind == "container":
        head = draw(st.sampled_from(CONTAINER_HEADERS))
        width = {0xDC: 2, 0xDE: 2, 0xDD: 4, 0xDF: 4}.get(head, 0)
        return bytes([head]) + draw(st.binary(min_size=width, max_size=width)) + draw(st.binary(max_size=16))
    if kind == "prefix":
        record = draw(st.sampled_from(records))
        return record[: draw(st.integers(1, len(record) - 1))] + draw(st.binary(max_size=6))
    head = draw(st.sampled_from([0xDB, 0xC6, 0xC9, 0xDD, 0xDF]))
    size = draw(st.sampled_from([200 * 1024 * 1024, 0xFFFFFFFF, 5 * 1024 * 1024, 70_000]))
    return bytes([head]) + size.to_bytes(4, "big") + draw(st.binary(max_size=4))


def _batch_header(record: bytes) -> int:
    head = record[0]
    return 1 if 0x90 <= head <= 0x9F else 3 if head == 0xDC else 0


@st.composite
def damaged_feeds(draw: st.DrawFn) -> list[Piece]:
    records = draw(st.lists(VALID, min_size=1, max_size=12))
    pieces: list[Piece] = []
    for i in range(len(records) + 1):
        if draw(st.integers(0, 2)) == 0:
            span = draw(spans(records))
            after = records[i][: _batch_header(records[i])] if i < len(records) else b""
            # A span that holds a whole valid tick is not damage (see hostile.py).
            if not holds_a_tick(span + after) and not absorbs_records(span, b"".join(records[i:])):
                pieces.append(Piece(span, False))
        if i < len(records):
            pieces.append(Piece(records[i], True))
    return pieces


WIRE_KEYS = {"sym", "ts", "seq", "kind", "bid_px", "bid_qty", "ask_px", "ask_qty", "trade_px", "trade_qty"}


def absorbs_records(span: bytes, rest: bytes) -> bool:
    """Whether the span with the records after it parses as values of which the last
    is one record that ends on a record boundary: a tick with only wire-format keys whose last value takes the next
    record's first bytes and ends where a record starts, or an array header whose items
    are the records that follow. Then the bytes hold no damage to find: a batch, or a
    tick, and what follows."""
    data = span + rest
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=False)
    unpacker.feed(data)
    end = 0
    while end < len(span):  # the values the span begins with, up to one that runs past it
        try:
            value = unpacker.unpack()
        except (msgpack.OutOfData, ValueError, TypeError, msgpack.UnpackException):
            return False
        end = unpacker.tell()
    if end == len(span):
        return False
    if isinstance(value, list):
        return bool(value) and all(wire(item) is not None for item in value)
    if not (isinstance(value, dict) and set(value) <= WIRE_KEYS and wire(value) is not None):
        return False
    if end == len(data):
        return True
    follower = msgpack.Unpacker(raw=False, strict_map_key=False)
    follower.feed(data[end:])
    try:
        nxt = follower.unpack()
    except (msgpack.OutOfData, ValueError, TypeError, msgpack.UnpackException):
        return False
    return all(wire(item) is not None for item in items_of(nxt)) if isinstance(nxt, list | dict) else False


def read_all(data: bytes, block: int, batch: int, scanner: bool) -> tuple[list[tuple[int, Any]], list[FramingReject]]:
    reader = FrameReader(io.BytesIO(data), block_bytes=block, use_scanner=scanner)
    records: list[tuple[int, Any]] = []
    rejects: list[FramingReject] = []
    for objects, offsets, framing in reader.batches(batch):
        records += zip(offsets, objects, strict=True)
        rejects += framing
    assert reader.done
    return records, rejects


def wire(tick: Any) -> dict[str, Any] | None:
    """A decoded record item as its validated wire map, or None when it is not a valid tick."""
    try:
        return decode_tick(tick.to_wire() if isinstance(tick, Tick) else tick).to_wire()
    except MalformedTickError:
        return None


def items_of(value: Any) -> list[Any]:
    return value if isinstance(value, list) else [value]


def starts_with_whole_value(span: bytes) -> bool:
    """Whether the span's first msgpack value ends inside it (with a batch header after
    it: inside the two)."""
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=False)
    unpacker.feed(span)
    try:
        unpacker.skip()
    except (msgpack.OutOfData, ValueError, TypeError, msgpack.UnpackException):
        return False
    return True


@pytest.mark.parametrize("scanner", SCANNER_MODES, ids=lambda s: "scanner" if s else "general")
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(pieces=damaged_feeds(), block=st.sampled_from([1, 3, 7, 64, 4096]), batch=st.integers(1, 5))
def test_damage_costs_only_the_damaged_bytes(pieces: list[Piece], block: int, batch: int, scanner: bool) -> None:
    data = b"".join(p.data for p in pieces)
    records, rejects = read_all(data, block, batch, scanner)
    layout: list[tuple[int, int, Piece]] = []
    at = 0
    for piece in pieces:
        layout.append((at, at + len(piece.data), piece))
        at += len(piece.data)

    # 1. Exactly the valid ticks, in order: none lost, none made up.
    expected = [wire(t) for _, _, p in layout if p.valid for t in items_of(msgpack.unpackb(p.data))]
    got = [w for _, value in records for item in items_of(value) if (w := wire(item)) is not None]
    assert got == expected

    # Every item of the output, by where it starts; each covers up to the next one.
    starts = sorted([(off, "record", value) for off, value in records] + [(r.offset, "reject", r) for r in rejects])
    assert [s[0] for s in starts] == sorted({s[0] for s in starts}), "two items start at one offset"
    reject_at = {r.offset: r for r in rejects}
    record_at = dict(records)
    for r in rejects:
        following = [s for s, _, _ in starts if s > r.offset]
        assert r.offset + r.size == (following[0] if following else len(data)), "a reject's size is its extent"

    for index, (start, end, piece) in enumerate(layout):
        if piece.valid:
            header = _batch_header(piece.data)
            if start in record_at:
                # 2. A valid record is found at its own offset, whole ...
                assert norm(record_at[start]) == norm(msgpack.unpackb(piece.data))
            else:
                # ... or, for a batch right after damage, item by item after the reject
                # that took its header (resync restarts at a tick map).
                assert header, f"valid record at {start} not recovered"
                assert index > 0 and not layout[index - 1][2].valid
                assert start + header in record_at  # its first tick, at its own offset
                # Its header went with the damage: to a reject, or to a malformed value
                # that the damage's last byte began.
                _, what, value = [s for s in starts if s[0] < start + header][-1]
                assert what == "reject" or all(wire(item) is None for item in items_of(value))
            # No reject starts inside a valid record.
            assert not [r for r in rejects if start < r.offset < end]
            continue
        # 3. A damaged span: a reject or a malformed record starts where it starts, and
        # nothing that starts inside it is a valid tick.
        inside = [s for s in starts if start <= s[0] < end]
        assert inside and inside[0][0] == start, f"span at {start} not accounted for: {inside}"
        for offset, what, value in inside:
            if what == "record":
                assert all(wire(item) is None for item in items_of(value)), f"a tick made up at {offset}"
        nxt = layout[index + 1][2] if index + 1 < len(layout) else None
        after = nxt.data[: _batch_header(nxt.data)] if nxt is not None else b""
        if not starts_with_whole_value(piece.data + after):
            # 4. Damage that does not begin with a whole value: one reject covering it.
            assert start in reject_at, f"span at {start} has no reject of its own: {inside}"
            reject = reject_at[start]
            last = end == len(data)
            allowed = {RejectReason.NOT_MSGPACK} | ({RejectReason.TRUNCATED, RejectReason.TOO_LARGE} if last else set())
            assert reject.reason in allowed
            reach = reject.offset + reject.size
            assert reach == end or (nxt is not None and nxt.valid and reach == end + _batch_header(nxt.data))
            assert len(inside) == 1


def norm(value: Any) -> list[dict[str, Any] | None]:
    return [wire(item) for item in items_of(_as_wire(value))]


def _as_wire(value: Any) -> Any:
    if isinstance(value, list):
        return [_as_wire(v) for v in value]
    return value.to_wire() if isinstance(value, Tick) else value


@pytest.mark.parametrize("scanner", SCANNER_MODES, ids=lambda s: "scanner" if s else "general")
def test_a_map_header_in_a_batch_items_float_is_no_tick_inside_it(scanner: bool) -> None:
    """A batch of valid ticks is one record even when a float of a wire-keys-only item
    holds a map header (0x85) that, with the next item's keys, parses as a tick of its
    own: such an item holds scalars only, as a record on its own does."""
    flagged = {"sym": "FENWORTH~KESMOOR", "ts": T0, "seq": 0, "kind": "delta", "venue_flags": ["x"]}
    trade = {
        "sym": "FENWORTH~KESMOOR",
        "ts": T0,
        "seq": 0,
        "kind": "delta",
        "trade_px": 1.0,
        "trade_qty": 8069.186676147585,
    }
    batch = msgpack.packb([flagged, trade, flagged])
    assert b"\x85/" in msgpack.packb(trade["trade_qty"])  # the header the float's bytes hold
    data = b"\x00" + msgpack.packb(flagged) + b"\x00" + batch + b"\x00"
    records, rejects = read_all(data, 1, 1, scanner)
    got = [w for _, value in records for item in items_of(value) if (w := wire(item)) is not None]
    assert got == [wire(flagged), wire(flagged), wire(trade), wire(flagged)]
    assert not [r for r in rejects if r.size > 1]


@pytest.mark.parametrize("scanner", SCANNER_MODES, ids=lambda s: "scanner" if s else "general")
def test_a_map_that_names_a_key_twice_is_damage_not_a_record(scanner: bool) -> None:
    """Damage that begins a map (here seven pairs: sym, then a ts cut short) whose count
    takes in the pairs of the valid record after it decodes, with msgpack's last-value-wins,
    as that record under another offset. Each key once is the rule: the map is damage and
    the valid record is read at its own offset (found by the recovery property test)."""
    valid = {"sym": "FENWORTH~KESMOOR", "ts": T0, "seq": 0, "kind": "delta", "ask_qty": None}
    damage = b"\x94\x87\xa3sym\xa1Q\xa2ts\xcf\x18" + bytes(6)  # ts lacks its last byte
    after = {"sym": "FENWORTH~KESMOOR", "ts": T0, "seq": 1, "kind": "delta"}
    data = b"\x00" + damage + msgpack.packb(valid) + msgpack.packb(after)
    records, rejects = read_all(data, 1, 1, scanner)
    start = 1 + len(damage)
    assert [(off, wire(value)) for off, value in records if wire(value) is not None] == [
        (start, wire(valid)),
        (start + len(msgpack.packb(valid)), wire(after)),
    ]
    assert [(r.offset, r.size) for r in rejects] == [(0, start)]  # the 0 before it too: no record follows it


@pytest.mark.parametrize("scanner", SCANNER_MODES, ids=lambda s: "scanner" if s else "general")
@pytest.mark.parametrize("cut", [2, 3, 4])
def test_a_batch_cut_inside_its_last_number_gives_back_the_record_it_took(scanner: bool, cut: int) -> None:
    """A batch (one item with a key beyond the wire format) whose last item lost the end
    of its last float takes the next record's first bytes and still decodes as a valid
    batch; the bytes after it are then no record, so it is taken back as damage and the
    records after it are read whole."""
    flagged = {"sym": "FENWORTH~KESMOOR", "ts": T0, "seq": 1, "kind": "delta", "venue_flags": ["x"]}
    last = {"sym": "FENWORTH~KESMOOR", "ts": T0, "seq": 2, "kind": "delta", "trade_qty": 1.0, "trade_px": 10.25}
    after = [
        {"sym": "MARROWAY~KESMOOR", "ts": T0 + 1, "seq": 3, "kind": "delta", "trade_px": 11.0, "trade_qty": 2.0},
        {"sym": "QUILLFERN~KESMOOR", "ts": T0 + 2, "seq": 4, "kind": "delta", "trade_px": 12.0, "trade_qty": 3.0},
    ]
    batch = msgpack.packb([flagged, last])
    data = batch[:-cut] + b"".join(msgpack.packb(r) for r in after)
    records, rejects = read_all(data, 1, 1, scanner)
    got = [w for _, value in records for item in items_of(value) if (w := wire(item)) is not None]
    assert got == [wire(r) for r in after]
    assert [(r.offset, r.size) for r in rejects] == [(0, len(batch) - cut)]
