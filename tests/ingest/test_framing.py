"""Framing: offsets, corruption resync, truncated tails."""

from __future__ import annotations

import io
import tracemalloc

import msgpack
from factories import T0, tick

from barsmith.ingest.framing import FrameReader
from barsmith.ingest.ticks import RejectReason, Tick


def read_all(data: bytes, block: int = 7) -> tuple[list[object], list[int], list[tuple[int, RejectReason]]]:
    reader = FrameReader(io.BytesIO(data), block_bytes=block)  # tiny blocks: records straddle them
    objects: list[object] = []
    offsets: list[int] = []
    rejects: list[tuple[int, RejectReason]] = []
    for objs, offs, rejs in reader.batches(3):
        objects += objs
        offsets += offs
        rejects += [(r.offset, r.reason) for r in rejs]
    return objects, offsets, rejects


def seq_of(record: object) -> int:
    """Well-formed records arrive as Tick objects; others as decoded maps."""
    if isinstance(record, Tick):
        return record.seq
    assert isinstance(record, dict)
    value: int = record["seq"]
    return value


def packed(n: int) -> list[bytes]:
    return [msgpack.packb(tick(ts=T0 + i, seq=i + 1)) for i in range(n)]


def test_offsets_are_record_starts() -> None:
    records = packed(5)
    objects, offsets, rejects = read_all(b"".join(records))
    assert len(objects) == 5 and rejects == []
    starts = [sum(len(r) for r in records[:i]) for i in range(5)]
    assert offsets == starts


def test_garbage_between_records_is_skipped_and_reported_once() -> None:
    records = packed(4)
    garbage = b"\xc1\xc1\xc1 not msgpack \xc1"
    data = records[0] + records[1] + garbage + records[2] + records[3]
    objects, offsets, rejects = read_all(data)
    assert [seq_of(o) for o in objects] == [1, 2, 3, 4]
    bad_at = len(records[0]) + len(records[1])
    assert rejects == [(bad_at, RejectReason.NOT_MSGPACK)]
    assert offsets[2] == bad_at + len(garbage)


def test_truncated_last_record_is_reported_as_such() -> None:
    records = packed(3)
    data = records[0] + records[1] + records[2][:-4]
    objects, _, rejects = read_all(data)
    assert len(objects) == 2
    assert rejects == [(len(records[0]) + len(records[1]), RejectReason.TRUNCATED)]


def test_a_cut_record_followed_by_valid_ones_loses_nothing_valid() -> None:
    records = packed(3)
    data = records[0] + records[1][:5] + records[2]
    objects, _, rejects = read_all(data)
    assert [seq_of(o) for o in objects] == [1, 3]
    assert [reason for _, reason in rejects] == [RejectReason.NOT_MSGPACK]


def test_unusual_records_take_the_general_path() -> None:
    unusual = [
        msgpack.packb(tick(ts=T0, seq=1, venue_flags=["x"])),  # an unknown key
        msgpack.packb([tick(ts=T0 + 1, seq=2), tick(ts=T0 + 2, seq=3)]),  # a batch
        msgpack.packb(tick(ts=T0 + 3, seq=4, bid_px=-1.0)),  # a bad value
        msgpack.packb(tick(ts=T0 + 4, seq=5, bid_qty=7)),  # an int quantity
    ]
    objects, offsets, rejects = read_all(b"".join(unusual), block=10)
    assert rejects == [] and len(objects) == 4
    assert isinstance(objects[0], dict)
    assert isinstance(objects[1], list) and all(isinstance(t, Tick) for t in objects[1])
    assert isinstance(objects[2], dict)
    assert isinstance(objects[3], Tick) and objects[3].bid_qty == 7.0
    assert offsets == [sum(len(r) for r in unusual[:i]) for i in range(4)]


def test_damage_that_begins_with_a_decodable_byte_is_still_one_span() -> None:
    records = packed(3)
    junk = b"\x05\x07\xc1\xc1"  # two small ints, then bytes that are no msgpack
    data = records[0] + junk + records[1] + records[2]
    objects, _offsets, rejects = read_all(data)
    assert [seq_of(o) for o in objects] == [1, 2, 3]
    assert rejects == [(len(records[0]), RejectReason.NOT_MSGPACK)]


def test_well_formed_values_between_records_are_records() -> None:
    records = packed(2)
    data = records[0] + msgpack.packb(5) + msgpack.packb({"x": 1}) + records[1]
    objects, _offsets, rejects = read_all(data)
    assert rejects == [] and objects[1:3] == [5, {"x": 1}]  # the engine rejects them, by their own reason


def test_a_container_header_does_not_swallow_the_records_after_it() -> None:
    records = packed(6)
    for header in (b"\x93", b"\x9f\x05", b"\xdd\x00\x10\x00\x00", b"\x81\xa1x", b"\xde\x00\x03\x01"):
        data = records[0] + header + b"".join(records[1:])
        objects, offsets, rejects = read_all(data)
        assert [seq_of(t) for o in objects for t in (o if isinstance(o, list) else [o])] == [1, 2, 3, 4, 5, 6]
        if header != b"\x93":  # a lone header of three items before three ticks *is* a batch of them
            assert rejects == [(len(records[0]), RejectReason.NOT_MSGPACK)], header
            assert offsets[1] == len(records[0]) + len(header), header


def test_a_cut_record_whose_last_number_takes_the_next_records_first_bytes_is_taken_back() -> None:
    records = [msgpack.packb(tick(ts=T0 + i, seq=i + 1, bid_qty=100.0 + i)) for i in range(4)]
    cut = records[1][:-3]  # bid_qty's float lacks three bytes: it takes them from record 2
    data = records[0] + cut + records[2] + records[3]
    for block in (7, 1 << 20):
        for batch in (1, 3, 100):
            reader = FrameReader(io.BytesIO(data), block_bytes=block)
            got = [(o, r) for objs, offs, rejs in reader.batches(batch) for o, r in zip(offs, objs, strict=True)]
            assert [seq_of(r) for _, r in got] == [1, 3, 4], (block, batch)
            assert [o for o, _ in got][1] == len(records[0]) + len(cut)


def test_a_batch_right_after_damage_is_read_tick_by_tick() -> None:
    singles = packed(2)
    batch = msgpack.packb([tick(ts=T0 + 5, seq=5), tick(ts=T0 + 6, seq=6)])
    data = singles[0] + b"\xc1\xc1" + batch + singles[1]
    objects, offsets, rejects = read_all(data)
    assert [seq_of(o) for o in objects] == [1, 5, 6, 2]
    at = len(singles[0])
    assert rejects == [(at, RejectReason.NOT_MSGPACK)]  # the two bytes and the batch's header
    assert offsets[1] == at + 3


def test_a_bogus_huge_length_is_not_buffered() -> None:
    records = packed(2000)
    data = records[0] + b"\xdb" + (200 * 1024 * 1024).to_bytes(4, "big") + b"".join(records[1:])
    tracemalloc.start()
    try:
        objects, _, rejects = read_all(data, block=64 * 1024)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert len(objects) == 2000 and rejects == [(len(records[0]), RejectReason.NOT_MSGPACK)]
    assert peak < 8 * 1024 * 1024


def test_a_record_above_the_size_cap_is_rejected_as_too_large() -> None:
    records = packed(3)
    big = msgpack.packb({"sym": "FENWORTH~KESMOOR", "blob": b"\x00" * 300_000})
    data = records[0] + big + records[1] + records[2]
    reader = FrameReader(io.BytesIO(data), block_bytes=4096, max_record_bytes=100_000)
    objects, rejects = [], []
    for objs, _, rejs in reader.batches(10):
        objects += objs
        rejects += rejs
    assert [seq_of(o) for o in objects] == [1, 2, 3]
    assert [(r.offset, r.reason, r.size) for r in rejects] == [(len(records[0]), RejectReason.TOO_LARGE, len(big))]
    # The same record under a cap it fits is an ordinary (malformed) record.
    objects, _, rejects = read_all(data, block=4096)
    assert rejects == [] and len(objects) == 4
