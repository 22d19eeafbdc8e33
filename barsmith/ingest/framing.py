"""Framing: a byte stream of concatenated msgpack records → records with byte offsets.

A recorded feed is a plain concatenation of msgpack values (maps, or arrays of maps
for batched producers), optionally gzip-compressed. :class:`FrameReader` decodes it
in batches and remembers each record's byte offset, so that a rejected record can be
found again in the file.

Corruption never stops a read. Bytes that are not msgpack are skipped up to the next
position where a plausible tick map decodes (the skipped span is reported as one
``not_msgpack`` reject); bytes left at the end that do not form a whole record are
reported as ``truncated``. Offsets are positions in the *uncompressed* stream.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import IO, Any, Final

import msgpack

from barsmith.errors import describe_error
from barsmith.ingest.fastwire import INCOMPLETE, NOT_SIMPLE, new_scanner
from barsmith.ingest.ticks import RejectReason

READ_BLOCK_BYTES: Final = 1 << 20
# Limits that make a corrupt length header fail fast instead of swallowing the
# records behind it (a tick's strings are tiny; a batch is a few thousand ticks).
MAX_STR_BYTES: Final = 64 * 1024
MAX_ARRAY_ITEMS: Final = 1_000_000
MAX_MAP_ITEMS: Final = 4096
# A reject keeps at most this much of the raw bytes it skipped.
MAX_KEPT_BYTES: Final = 4096

# First bytes of a msgpack map (fixmap, map16, map32) or array (fixarray, array16, array32).
_CONTAINER_HEADERS: Final = frozenset([*range(0x80, 0x90), 0xDE, 0xDF, *range(0x90, 0xA0), 0xDC, 0xDD])
_DECODE_ERRORS: Final = (msgpack.exceptions.UnpackException, ValueError, TypeError)


@dataclass(slots=True)
class FramingReject:
    """Bytes at ``offset`` that did not decode as a msgpack record."""

    offset: int
    reason: RejectReason
    detail: str
    raw: bytes


def new_unpacker() -> msgpack.Unpacker:
    """An unpacker with barsmith's limits (also used for Kafka record values)."""
    return msgpack.Unpacker(
        raw=False,
        strict_map_key=False,
        max_buffer_size=64 * READ_BLOCK_BYTES,
        max_str_len=MAX_STR_BYTES,
        max_bin_len=MAX_STR_BYTES,
        max_array_len=MAX_ARRAY_ITEMS,
        max_map_len=MAX_MAP_ITEMS,
        max_ext_len=MAX_STR_BYTES,
    )


def looks_like_tick(obj: Any) -> bool:
    """Whether a decoded value is plausibly a tick map or a batch of them (for resync)."""
    if isinstance(obj, list):
        return bool(obj) and looks_like_tick(obj[0])
    return isinstance(obj, dict) and isinstance(obj.get("sym"), str) and "seq" in obj


class FrameReader:
    """Decode a binary stream into batches of ``(records, offsets, rejects)``.

    Records of the usual shape are decoded straight into :class:`Tick` objects (or
    lists of them, for a batched record) by the record scanner
    (:mod:`barsmith.ingest.fastwire`); any other record
    is decoded by msgpack into plain objects, which the engine validates the
    general way. Offsets are where each record starts.
    """

    def __init__(self, stream: IO[bytes], block_bytes: int = READ_BLOCK_BYTES) -> None:
        self._stream = stream
        self._block_bytes = block_bytes
        self._buf = b""
        self._base = 0  # absolute offset of _buf[0]
        self._pos = 0  # next record's index in _buf
        self._eof = False
        self._done = False
        self._scanner = new_scanner()

    @property
    def done(self) -> bool:
        """True once the stream is exhausted and every byte accounted for."""
        return self._done

    def batches(self, max_records: int) -> Iterator[tuple[list[Any], list[int], list[FramingReject]]]:
        """Yield batches of at most ``max_records`` records until the stream ends."""
        while not self._done:
            batch = self.read_batch(max_records)
            if batch[0] or batch[2]:
                yield batch

    def read_batch(self, max_records: int) -> tuple[list[Any], list[int], list[FramingReject]]:
        """Decode up to ``max_records`` records; returns empty lists once done."""
        objects: list[Any] = []
        offsets: list[int] = []
        rejects: list[FramingReject] = []
        scanner = self._scanner
        while len(objects) < max_records and not self._done:
            buf = self._buf
            pos = self._pos
            base = self._base
            end = len(buf)
            # Without a scanner every record takes the general path below.
            result = INCOMPLETE if scanner is not None else NOT_SIMPLE
            # Hot loop: one scan and two appends per record.
            while scanner is not None and pos < end and len(objects) < max_records:
                result = scanner.scan_record(buf, pos)
                if result < 0:
                    break
                objects.append(scanner.tick if scanner.batch is None else scanner.batch)
                offsets.append(base + pos)
                pos = result
            self._pos = pos
            if len(objects) >= max_records:
                break
            if pos >= end or result == INCOMPLETE:
                if self._refill():
                    continue
                if self._pos >= len(self._buf):
                    self._done = True
                    break
            self._general_record(objects, offsets, rejects)
        return objects, offsets, rejects

    # -- buffering -------------------------------------------------------------------

    def _refill(self) -> bool:
        """Append the next block to what is left of the buffer; False at end of stream."""
        if self._eof:
            return False
        block = self._stream.read(self._block_bytes)
        if not block:
            self._eof = True
            return False
        self._buf = self._buf[self._pos :] + block
        self._base += self._pos
        self._pos = 0
        return True

    def _general_record(self, objects: list[Any], offsets: list[int], rejects: list[FramingReject]) -> None:
        """Decode the record at the current position with msgpack (any shape), or
        report what is wrong there and move past it."""
        window = 4096
        while True:
            start = self._pos
            buf = self._buf
            unpacker = new_unpacker()
            unpacker.feed(buf[start : start + window])
            try:
                obj = unpacker.unpack()
            except msgpack.exceptions.OutOfData:
                if start + window < len(buf):
                    window *= 4
                    continue
                if self._refill():
                    continue
                self._finish_tail(rejects)
                return
            except _DECODE_ERRORS as exc:
                self._resync(describe_error(exc), rejects)
                return
            objects.append(obj)
            offsets.append(self._base + start)
            self._pos = start + unpacker.tell()
            return

    def _finish_tail(self, rejects: list[FramingReject]) -> None:
        """At end of input, bytes remain that do not form a whole record: corruption
        if a valid record follows inside them, otherwise a truncated last record."""
        leftover = self._buf[self._pos :]
        offset = self._base + self._pos
        resume = _find_resync_point(leftover, 1)
        if resume is None:
            rejects.append(
                FramingReject(
                    offset,
                    RejectReason.TRUNCATED,
                    f"last record is incomplete: {len(leftover)} bytes at end of input",
                    leftover[:MAX_KEPT_BYTES],
                )
            )
            self._pos = len(self._buf)
            self._done = True
            return
        rejects.append(_skipped(offset, leftover[:resume], "bytes before a later record do not decode"))
        self._pos += resume

    def _resync(self, why: str, rejects: list[FramingReject]) -> None:
        """Skip undecodable bytes up to the next plausible record (reading on if needed)."""
        while True:
            resume = _find_resync_point(self._buf, self._pos + 1)
            if resume is not None or not self._refill():
                break
        offset = self._base + self._pos
        if resume is None:
            rejects.append(_skipped(offset, self._buf[self._pos :], why))
            self._pos = len(self._buf)
            return
        rejects.append(_skipped(offset, self._buf[self._pos : resume], why))
        self._pos = resume


def _skipped(offset: int, data: bytes, why: str) -> FramingReject:
    return FramingReject(offset, RejectReason.NOT_MSGPACK, f"{len(data)} bytes skipped ({why})", data[:MAX_KEPT_BYTES])


def _find_resync_point(data: bytes, start: int) -> int | None:
    """The first position ≥ ``start`` where a plausible tick record decodes completely."""
    for pos in range(start, len(data)):
        if data[pos] not in _CONTAINER_HEADERS:
            continue
        probe = new_unpacker()
        probe.feed(data[pos : pos + 4 * MAX_STR_BYTES])
        try:
            obj = probe.unpack()
        except msgpack.exceptions.OutOfData:
            continue
        except _DECODE_ERRORS:
            continue
        if looks_like_tick(obj):
            return pos
    return None
