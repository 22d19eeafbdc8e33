"""Framing: offsets, corruption resync, truncated tails."""

from __future__ import annotations

import io

import msgpack
from factories import T0, tick

from barsmith.ingest.framing import FrameReader
from barsmith.ingest.ticks import RejectReason


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
    assert [o["seq"] for o in objects] == [1, 2, 3, 4]  # type: ignore[index]
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
    assert [o["seq"] for o in objects] == [1, 3]  # type: ignore[index]
    assert [reason for _, reason in rejects] == [RejectReason.NOT_MSGPACK]
