"""Framing: a byte stream of concatenated msgpack records → decoded objects with offsets.

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
    """Decode a binary stream into batches of ``(objects, offsets, rejects)``."""

    def __init__(self, stream: IO[bytes], block_bytes: int = READ_BLOCK_BYTES) -> None:
        self._stream = stream
        self._block_bytes = block_bytes
        self._unpacker = new_unpacker()
        self._base = 0  # absolute offset of the unpacker's position 0
        self._next_start = 0  # absolute offset where the next record starts
        self._fed_end = 0  # absolute offset just past the last byte fed
        self._blocks: list[tuple[int, bytes]] = []  # fed blocks not yet wholly consumed
        self._eof = False
        self._done = False

    @property
    def done(self) -> bool:
        """True once the stream is exhausted and every byte accounted for."""
        return self._done

    def batches(self, max_records: int) -> Iterator[tuple[list[Any], list[int], list[FramingReject]]]:
        """Yield batches of at most ``max_records`` decoded objects until the stream ends."""
        while not self._done:
            batch = self.read_batch(max_records)
            if batch[0] or batch[2]:
                yield batch

    def read_batch(self, max_records: int) -> tuple[list[Any], list[int], list[FramingReject]]:
        """Decode up to ``max_records`` objects; returns empty lists once done."""
        objects: list[Any] = []
        offsets: list[int] = []
        rejects: list[FramingReject] = []
        while len(objects) < max_records and not self._done:
            unpacker = self._unpacker
            base = self._base
            try:
                # Hot loop: one append pair per record. The unpacker resumes partial
                # records across feeds and its tell() then counts the partly parsed
                # bytes, so a record's start is tracked here, after each whole record.
                for obj in unpacker:
                    objects.append(obj)
                    offsets.append(self._next_start)
                    self._next_start = base + unpacker.tell()
                    if len(objects) >= max_records:
                        break
                else:
                    self._feed_or_finish(self._next_start, rejects)
            except _DECODE_ERRORS as exc:
                self._resync(self._next_start, f"{type(exc).__name__}: {exc}", rejects)
        return objects, offsets, rejects

    # -- buffering -------------------------------------------------------------------

    def _read_block(self) -> bytes:
        if self._eof:
            return b""
        block = self._stream.read(self._block_bytes)
        if not block:
            self._eof = True
        return block

    def _feed(self, block: bytes, consumed_to: int) -> None:
        self._blocks = [(start, data) for start, data in self._blocks if start + len(data) > consumed_to]
        self._blocks.append((self._fed_end, block))
        self._fed_end += len(block)
        self._unpacker.feed(block)

    def _bytes_from(self, offset: int) -> bytes:
        """The fed bytes from ``offset`` to the end of what was fed."""
        parts = [data[max(0, offset - start) :] for start, data in self._blocks if start + len(data) > offset]
        return b"".join(parts)

    def _restart_at(self, offset: int, data: bytes) -> None:
        """Start a fresh unpacker at absolute ``offset`` holding ``data`` (bytes from there)."""
        self._unpacker = new_unpacker()
        self._base = offset
        self._next_start = offset
        self._blocks = [(offset, data)] if data else []
        if data:
            self._unpacker.feed(data)

    def _feed_or_finish(self, consumed_to: int, rejects: list[FramingReject]) -> None:
        block = self._read_block()
        if block:
            self._feed(block, consumed_to)
            return
        leftover = self._bytes_from(consumed_to)
        if not leftover:
            self._done = True
            return
        # Bytes remain that do not form a whole record: corruption if a valid record
        # follows inside them, otherwise the last record was cut short.
        resume = _find_resync_point(leftover, 1)
        if resume is None:
            rejects.append(
                FramingReject(
                    consumed_to,
                    RejectReason.TRUNCATED,
                    f"last record is incomplete: {len(leftover)} bytes at end of input",
                    leftover[:MAX_KEPT_BYTES],
                )
            )
            self._done = True
            return
        rejects.append(_skipped(consumed_to, leftover[:resume], "bytes before a later record do not decode"))
        self._restart_at(consumed_to + resume, leftover[resume:])

    def _resync(self, offset: int, why: str, rejects: list[FramingReject]) -> None:
        data = self._bytes_from(offset)
        while True:
            resume = _find_resync_point(data, 1)
            if resume is not None or self._eof:
                break
            block = self._read_block()
            self._fed_end += len(block)
            data += block
        if resume is None:
            rejects.append(_skipped(offset, data, why))
            self._restart_at(offset + len(data), b"")
            self._fed_end = offset + len(data)
            return
        rejects.append(_skipped(offset, data[:resume], why))
        self._restart_at(offset + resume, data[resume:])


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
