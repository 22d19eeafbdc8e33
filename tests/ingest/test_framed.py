"""The framed recording format: round trips, and damage found and bounded to its block."""

from __future__ import annotations

import gzip
import io
import struct
from pathlib import Path
from typing import Any

import msgpack
import pytest
from factories import T0, tick

from barsmith.errors import InputError
from barsmith.ingest.framed import (
    BLOCK_HEADER_BYTES,
    FILE_HEADER_BYTES,
    FramedWriter,
    block,
    crc32c,
    file_header,
)
from barsmith.ingest.framing import FrameReader, FramingReject
from barsmith.ingest.ticks import RejectReason, Tick
from barsmith.sources.files import FileSource


def test_crc32c_check_value() -> None:
    # The usual check value of CRC-32C (Castagnoli): RFC 3720 (iSCSI), from memory.
    assert crc32c(b"123456789") == 0xE3069283


def records(n: int) -> list[bytes]:
    return [msgpack.packb(tick(ts=T0 + i, seq=i + 1, bid_qty=float(i))) for i in range(n)]


def framed(recs: list[bytes], target: int = 300) -> tuple[bytes, list[int], list[int]]:
    """A recording of ``recs`` in small blocks: (bytes, each record's offset, each block's offset)."""
    out = io.BytesIO()
    writer = FramedWriter(out, block_target_bytes=target)
    for rec in recs:
        writer.write(rec)
    writer.flush()
    data = out.getvalue()
    # Where the blocks and records are, by the layout the README gives.
    offsets: list[int] = []
    blocks: list[int] = []
    at = FILE_HEADER_BYTES
    while at < len(data):
        (length,) = struct.unpack_from("<I", data, at + 4)
        blocks.append(at)
        inner = at + BLOCK_HEADER_BYTES
        while inner < at + BLOCK_HEADER_BYTES + length:
            offsets.append(inner)
            inner += len(recs[len(offsets) - 1])
        at += BLOCK_HEADER_BYTES + length
    assert len(offsets) == len(recs)
    return data, offsets, blocks


def read(data: bytes, block: int = 1 << 20, batch: int = 7) -> tuple[list[tuple[int, Any]], list[FramingReject]]:
    reader = FrameReader(io.BytesIO(data), block_bytes=block)
    got: list[tuple[int, Any]] = []
    rejects: list[FramingReject] = []
    for objects, offsets, framing in reader.batches(batch):
        got += zip(offsets, objects, strict=True)
        rejects += framing
    assert reader.framed or not data.startswith(b"\xc1barsmf")
    return got, rejects


def seqs(got: list[tuple[int, Any]]) -> list[int]:
    return [r.seq if isinstance(r, Tick) else r["seq"] for _, r in got]


@pytest.mark.parametrize("block", [1, 5, 64, 1 << 20])
def test_round_trip_keeps_records_and_their_offsets(block: int) -> None:
    recs = records(40)
    data, offsets, blocks = framed(recs)
    assert len(blocks) > 5
    got, rejects = read(data, block)
    assert rejects == []
    assert seqs(got) == list(range(1, 41))
    assert [o for o, _ in got] == offsets
    for offset, rec in zip(offsets, recs, strict=True):
        assert data[offset : offset + len(rec)] == rec  # offsets point into the file


HALF = {"sym": "JUNK", "ts": 1798794000000000000, "seq": 1, "kind": "delta", "trade_qty": 1.0}  # half a trade


def test_values_that_are_no_ticks_in_a_verified_block_stay_one_record_each() -> None:
    # A plain feed cannot tell such values from damage (this float's bytes hold a map
    # header that reads as a tick starting inside it); a checked block can.
    odd = [msgpack.packb([[[[0.3102217959415339]]]]), msgpack.packb(HALF), b"\x07"]
    recs = records(3)
    mixed = [recs[0], odd[0], odd[1], odd[2], recs[1], odd[0], recs[2]]
    data, offsets, _ = framed(mixed, target=1 << 16)
    got, rejects = read(data)
    assert rejects == []
    assert [o for o, _ in got] == offsets
    assert [got[i][1] for i in (1, 2, 3)] == [[[[[0.3102217959415339]]]], HALF, 7]


def test_a_flipped_byte_in_a_payload_is_found_and_bounded_to_its_block() -> None:
    recs = records(40)
    data, offsets, blocks = framed(recs)
    # Flip a byte of a float inside the third block: still valid msgpack, wrong value.
    at = offsets[recs.index(next(r for i, r in enumerate(recs) if offsets[i] > blocks[2]))] + len(recs[0]) - 2
    damaged = bytearray(data)
    damaged[at] ^= 0x01
    got, rejects = read(bytes(damaged))
    assert [(r.offset, r.reason) for r in rejects] == [(blocks[2], RejectReason.BAD_BLOCK)]
    assert "CRC-32C" in rejects[0].detail
    assert rejects[0].size == blocks[3] - blocks[2]
    # Salvaged record by record: every record is still read, at its own offset.
    assert [o for o, _ in got] == offsets


def test_a_damaged_length_resyncs_at_the_next_sync_marker() -> None:
    recs = records(40)
    data, offsets, blocks = framed(recs)
    damaged = bytearray(data)
    struct.pack_into("<I", damaged, blocks[1] + 4, 0x00FFFFFF)  # the second block's length
    got, rejects = read(bytes(damaged))
    assert [(r.offset, r.reason) for r in rejects] == [
        (blocks[1], RejectReason.BAD_BLOCK),  # not an intact block up to the next one
        (blocks[1], RejectReason.NOT_MSGPACK),  # its header, to the plain recovery
    ]
    assert rejects[0].size == blocks[2] - blocks[1] and rejects[1].size == BLOCK_HEADER_BYTES
    assert [o for o, _ in got] == offsets  # the damaged block's records are still read


def test_a_recording_cut_inside_a_block() -> None:
    recs = records(40)
    data, offsets, blocks = framed(recs)
    cut = data[: offsets[-3] + 5]  # inside the third-last record
    got, rejects = read(cut)
    assert [(r.offset, r.reason) for r in rejects] == [
        (blocks[-1], RejectReason.BAD_BLOCK),
        (offsets[-3], RejectReason.TRUNCATED),
    ]
    assert [o for o, _ in got] == offsets[:-3]
    # Cut inside a block header: that header alone is reported.
    got, rejects = read(data[: blocks[-1] + 6])
    assert [(r.offset, r.reason) for r in rejects] == [(blocks[-1], RejectReason.TRUNCATED)]
    assert len(got) == len([o for o in offsets if o < blocks[-1]])


def test_garbage_between_blocks() -> None:
    recs = records(30)
    data, offsets, blocks = framed(recs)
    junk = b"\x93\x85garbage\xc1 between\xdd\xff\xff\xff\xffblocks"
    damaged = data[: blocks[2]] + junk + data[blocks[2] :]
    got, rejects = read(damaged, block=3)
    assert [(r.offset, r.reason, r.size) for r in rejects] == [
        (blocks[2], RejectReason.BAD_BLOCK, len(junk)),
        (blocks[2], RejectReason.NOT_MSGPACK, len(junk)),
    ]
    assert [o for o, _ in got] == [o if o < blocks[2] else o + len(junk) for o in offsets]


def test_gzip_framed_file_is_detected(tmp_path: Path) -> None:
    recs = records(25)
    data, offsets, _ = framed(recs)
    path = tmp_path / "recorded.bsf.gz"
    path.write_bytes(gzip.compress(data))
    plain = tmp_path / "plain.msgpack"
    plain.write_bytes(b"".join(recs))

    async def collect(p: Path) -> tuple[list[int], list[int]]:
        got: list[int] = []
        positions: list[int] = []
        async for batch in FileSource([p]).batches():
            assert batch.rejects == []
            got += [r.seq for r in batch.records]
            positions += batch.positions
        return got, positions

    import asyncio

    got, positions = asyncio.run(collect(path))
    assert got == list(range(1, 26)) and positions == offsets
    assert asyncio.run(collect(plain))[0] == got


def test_empty_recordings() -> None:
    assert read(b"") == ([], [])
    assert read(file_header()) == ([], [])
    assert read(file_header() + block(b"")) == ([], [])


def test_a_newer_format_version_is_refused_with_advice() -> None:
    with pytest.raises(InputError, match="version 2"):
        read(file_header(version=2) + block(records(1)[0]))


def test_a_damaged_file_header_is_reported_and_the_blocks_still_read() -> None:
    data, offsets, _ = framed(records(10))
    damaged = bytearray(data)
    damaged[9] ^= 0x40  # the version field: the header's own check fails
    got, rejects = read(bytes(damaged))
    assert [(r.offset, r.reason) for r in rejects] == [(0, RejectReason.BAD_BLOCK)]
    assert [o for o, _ in got] == offsets


def test_recordings_put_one_after_another() -> None:
    first, offsets, _ = framed(records(5))
    second, more, _ = framed(records(7))
    got, rejects = read(first + second)
    assert rejects == []
    assert [o for o, _ in got] == offsets + [o + len(first) for o in more]


def test_a_block_above_what_the_reader_takes_is_skipped_unread() -> None:
    small = records(3)
    huge = msgpack.packb({"sym": "FENWORTH~KESMOOR", "blob": b"\x00" * 200_000})
    data = file_header() + block(small[0]) + block(huge) + block(small[1] + small[2])
    reader = FrameReader(io.BytesIO(data), block_bytes=4096, max_record_bytes=100_000)
    got = [r for objects, _, _ in reader.batches(10) for r in objects]
    reader = FrameReader(io.BytesIO(data), block_bytes=4096, max_record_bytes=100_000)
    rejects = [r for _, _, framing in reader.batches(10) for r in framing]
    assert [r.seq for r in got] == [1, 2, 3]
    huge_at = FILE_HEADER_BYTES + BLOCK_HEADER_BYTES + len(small[0])
    assert [(r.offset, r.reason, r.size) for r in rejects] == [
        (huge_at, RejectReason.TOO_LARGE, BLOCK_HEADER_BYTES + len(huge))
    ]
