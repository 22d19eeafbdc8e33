"""barsmith's framed recording format: msgpack records in checksummed blocks.

``barsmith record`` writes it; every reader of recorded files (replay, publish)
recognises it by its file header, compressed or not, beside plain concatenations of
msgpack records. Integers are little-endian; checksums are CRC-32C (Castagnoli)::

    file header (16 bytes, once, at offset 0)
      0   8  magic            C1 62 61 72 73 6D 66 0A   ("\\xc1barsmf\\n")
      8   2  version          1
     10   2  flags            0 (reserved)
     12   4  header check     CRC-32C of bytes 0-11
    block (repeated to the end of the file)
      0   4  sync marker      C1 5E B7 0D
      4   4  payload length   bytes of payload that follow the block header
      8   4  payload check    CRC-32C of the payload
     12   4  header check     CRC-32C of bytes 0-11 of this block header
     16   n  payload          whole msgpack records, concatenated

Both markers begin with 0xC1, the one byte msgpack never uses, so neither can be
taken for a record by the plain-file recovery, and a plain feed (which starts with
a record) is never taken for a framed one. The header check tells a damaged length
from a true one before any payload is read; the payload check finds damage inside a
block. A block holds whole records, up to :data:`BLOCK_TARGET_BYTES` of them (a
record larger than that gets a block of its own).

How damage is bounded (see :class:`BlockReader`): a block whose header is intact
but whose payload fails its check is still read, record by record, with the
plain-file recovery, and reported once as ``bad_block``; bytes that are not an
intact block (a damaged header, garbage between blocks) are read the same way up
to the next intact block header, and reported once as ``bad_block`` too.
"""

from __future__ import annotations

import struct
from collections.abc import Iterable
from dataclasses import dataclass
from typing import IO, Final, Protocol

import google_crc32c

from barsmith.errors import InputError
from barsmith.ingest.ticks import RejectReason

FILE_MAGIC: Final = b"\xc1barsmf\n"
FORMAT_VERSION: Final = 1
SYNC_MARKER: Final = b"\xc1\x5e\xb7\x0d"
FILE_HEADER_BYTES: Final = 16
BLOCK_HEADER_BYTES: Final = 16
# Blocks of about 64 KiB: the checksum costs nothing next to decoding, and damage
# puts at most one block's records in doubt.
BLOCK_TARGET_BYTES: Final = 64 * 1024
# The first bytes of an unverified stretch kept in its bad_block row.
KEPT_BYTES: Final = 64

_FILE_HEADER: Final = struct.Struct("<8sHHI")
_BLOCK_HEADER: Final = struct.Struct("<4sIII")


def crc32c(data: bytes) -> int:
    """CRC-32C (Castagnoli) of ``data``, from the google-crc32c library."""
    return int(google_crc32c.value(data))


def file_header(version: int = FORMAT_VERSION) -> bytes:
    """The 16-byte header that opens a framed recording."""
    head = _FILE_HEADER.pack(FILE_MAGIC, version, 0, 0)[:12]
    return head + struct.pack("<I", crc32c(head))


def block(payload: bytes) -> bytes:
    """One block: its 16-byte header, then ``payload``."""
    head = _BLOCK_HEADER.pack(SYNC_MARKER, len(payload), crc32c(payload), 0)[:12]
    return head + struct.pack("<I", crc32c(head)) + payload


def read_file_header(data: bytes) -> int | None:
    """The version in an intact file header at the start of ``data``; None when the
    16 bytes there are not one (damaged, cut short, or another format)."""
    if len(data) < FILE_HEADER_BYTES or not data.startswith(FILE_MAGIC):
        return None
    _magic, version, _flags, check = _FILE_HEADER.unpack_from(data, 0)
    if crc32c(data[:12]) != check:
        return None
    return int(version)


def check_version(version: int) -> None:
    """Refuse, with advice, a recording this barsmith cannot read."""
    if version != FORMAT_VERSION:
        raise InputError(
            f"framed recording format version {version} is not readable by this barsmith (it reads "
            f"version {FORMAT_VERSION}); use the barsmith that recorded it, or a newer one"
        )


def _block_header(data: bytes, at: int) -> tuple[int, int] | None:
    """(payload length, payload check) of an intact block header at ``data[at]``."""
    if at + BLOCK_HEADER_BYTES > len(data) or data[at : at + 4] != SYNC_MARKER:
        return None
    _sync, length, payload_check, check = _BLOCK_HEADER.unpack_from(data, at)
    if crc32c(data[at : at + 12]) != check:
        return None
    return int(length), int(payload_check)


class Writable(Protocol):
    """Where a recording goes: a file, a gzip stream."""

    def write(self, data: bytes, /) -> int: ...


class FramedWriter:
    """Writes records (whole msgpack values, as bytes) into a framed recording."""

    def __init__(self, handle: Writable, block_target_bytes: int = BLOCK_TARGET_BYTES) -> None:
        self._handle = handle
        self._target = block_target_bytes
        self._parts: list[bytes] = []
        self._size = 0
        handle.write(file_header())

    def write(self, record: bytes) -> None:
        """Add one record; a block is written when the next record would overfill it."""
        if self._parts and self._size + len(record) > self._target:
            self.flush()
        self._parts.append(record)
        self._size += len(record)

    def write_all(self, records: Iterable[bytes]) -> None:
        for record in records:
            self.write(record)

    def flush(self) -> None:
        """Write the records added so far as one block (nothing when there are none)."""
        if self._parts:
            self._handle.write(block(b"".join(self._parts)))
            self._parts = []
            self._size = 0


@dataclass(slots=True)
class Problem:
    """Why a segment is not a verified payload: one reject row at ``offset``."""

    offset: int
    reason: RejectReason
    detail: str
    raw: bytes
    size: int  # how many bytes of the stream it stands for


@dataclass(slots=True)
class Segment:
    """A stretch of a framed recording to decode: ``data`` starts at byte ``offset`` of
    the (uncompressed) stream. ``problem`` is None for a verified payload; ``data`` is
    empty for bytes that were skipped."""

    offset: int
    data: bytes
    problem: Problem | None = None


class BlockReader:
    """Splits a framed recording (after its file header) into :class:`Segment` s.

    At each position: an intact block header gives its payload — verified, or not
    (checksum mismatch, or cut short by the end of input); anything else is an
    unverified stretch that runs up to the next intact block header. Memory is
    bounded by ``max_payload_bytes``: a block announcing more is skipped unread
    (``too_large``), and an unverified stretch is handed out in pieces of at most that
    size.
    """

    def __init__(self, stream: IO[bytes], data: bytes, offset: int, read_bytes: int, max_payload_bytes: int) -> None:
        self._stream = stream
        self._raw = data  # bytes read and not yet handed out start at _raw[0]
        self._base = offset  # stream offset of _raw[0]
        self._read_bytes = read_bytes
        self._max_payload = max_payload_bytes
        self._eof = False

    def next_segment(self) -> Segment | None:
        """The next segment, or None at the end of the stream."""
        while True:
            self._fill(BLOCK_HEADER_BYTES)
            if not self._raw:
                return None
            version = read_file_header(self._raw)
            if version is not None:
                # Recordings concatenated into one file: the next one's header.
                check_version(version)
                self._take(FILE_HEADER_BYTES)
                continue
            if len(self._raw) < BLOCK_HEADER_BYTES and SYNC_MARKER.startswith(self._raw[:4]):
                start = self._base
                head = self._take(len(self._raw))
                why = f"block header cut short by the end of input ({len(head)} of {BLOCK_HEADER_BYTES} bytes)"
                return Segment(start, b"", Problem(start, RejectReason.TRUNCATED, why, head, len(head)))
            header = _block_header(self._raw, 0)
            if header is None:
                return self._unverified_stretch()
            return self._block(*header)

    def _block(self, length: int, payload_check: int) -> Segment:
        start = self._base
        if length > self._max_payload:
            head = self._take(BLOCK_HEADER_BYTES)
            self._discard(length)
            why = f"block of {length:,} bytes, more than this reader takes ({self._max_payload:,}); skipped unread"
            return Segment(start, b"", Problem(start, RejectReason.TOO_LARGE, why, head, BLOCK_HEADER_BYTES + length))
        self._fill(BLOCK_HEADER_BYTES + length)
        head = self._take(BLOCK_HEADER_BYTES)
        payload = self._take(length)
        if len(payload) < length:
            why = f"block cut short by the end of input ({len(payload):,} of {length:,} payload bytes); read unverified"
            problem = Problem(start, RejectReason.BAD_BLOCK, why, head, BLOCK_HEADER_BYTES + len(payload))
            return Segment(start + BLOCK_HEADER_BYTES, payload, problem)
        if crc32c(payload) != payload_check:
            why = f"payload of {length:,} bytes fails its CRC-32C; its records were read unverified"
            problem = Problem(start, RejectReason.BAD_BLOCK, why, head, BLOCK_HEADER_BYTES + length)
            return Segment(start + BLOCK_HEADER_BYTES, payload, problem)
        return Segment(start + BLOCK_HEADER_BYTES, payload)

    def _unverified_stretch(self) -> Segment:
        """Bytes from here to the next intact block header (or file header), at most
        ``max_payload`` bytes at a time."""
        limit = self._max_payload + BLOCK_HEADER_BYTES
        at = 1
        while True:
            found = _next_marker(self._raw, at)
            if found < 0:
                if len(self._raw) >= limit or not self._more():
                    end = min(len(self._raw), limit)
                    break
                continue
            if found >= limit:
                end = limit
                break
            if found + BLOCK_HEADER_BYTES > len(self._raw) and self._more():
                continue
            if _block_header(self._raw, found) is not None or read_file_header(self._raw[found:]) is not None:
                end = found
                break
            at = found + 1
        start = self._base
        data = self._take(end)
        why = f"{len(data):,} bytes that are not an intact block; read with the plain-file recovery"
        return Segment(start, data, Problem(start, RejectReason.BAD_BLOCK, why, data[:KEPT_BYTES], len(data)))

    # -- buffering -------------------------------------------------------------------

    def _more(self) -> bool:
        if self._eof:
            return False
        chunk = self._stream.read(self._read_bytes)
        if not chunk:
            self._eof = True
            return False
        self._raw += chunk
        return True

    def _fill(self, size: int) -> None:
        while len(self._raw) < size and self._more():
            pass

    def _take(self, size: int) -> bytes:
        data = self._raw[:size]
        self._raw = self._raw[size:]
        self._base += len(data)
        return data

    def _discard(self, size: int) -> None:
        """Skip ``size`` bytes without holding them."""
        while size > 0:
            if not self._raw and not self._more():
                return
            size -= len(self._take(size))


def _next_marker(data: bytes, start: int) -> int:
    """Where the next sync marker or file magic starts at or after ``start`` (-1: none).
    Both begin with 0xC1; the caller checks the header that follows."""
    return data.find(b"\xc1", start)
