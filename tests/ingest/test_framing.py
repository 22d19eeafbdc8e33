"""Framing: offsets, corruption resync, truncated tails."""

from __future__ import annotations

import io

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
