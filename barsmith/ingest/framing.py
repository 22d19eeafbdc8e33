"""Framing: a byte stream of records → records with byte offsets.

A recorded feed is a plain concatenation of msgpack values (tick maps, or arrays of
them for batched producers), or barsmith's framed recording format
(:mod:`barsmith.ingest.framed`: the same records in checksummed blocks), either one
optionally gzip-compressed. :class:`FrameReader` tells them apart by the first bytes,
decodes records in batches and remembers each record's byte offset (in the
*uncompressed* stream), so that a rejected record can be found again in the file.

Corruption never stops a read, and costs only the damaged bytes. The rules:

- A *valid tick record* at a position is a tick map there that decodes (within
  ``max_record_bytes``) and passes :func:`~barsmith.ingest.ticks.decode_tick`.
- At a record boundary, a value that is a tick map with only the wire format's keys
  (so only scalar values), or an array of such maps, is taken as it is: it cannot
  hold another record. Any other value is taken as a record only if no valid tick
  record starts strictly inside it ("prefer the smaller records": garbage whose
  length header runs into the records after it would otherwise swallow them). An
  array whose items are all valid ticks is a batch, and neither its items' own starts
  nor the bytes of an item with only wire-format keys count as "inside". A value that
  is not a valid record (a malformed record) is taken as one only when what follows it
  is a record boundary too: a valid record, the end of input, or more such values
  ending in one — so that damage that happens to begin with a decodable byte is
  still one span.
- Otherwise the bytes from there up to the next position where a valid tick record
  starts are one ``not_msgpack`` reject. Reading resumes at a tick map: an array
  header just before it is counted with the damage, and that batch's ticks are read
  one by one (same ticks, each with its own offset).
- A value longer than ``max_record_bytes`` is never buffered whole: if a valid tick
  record starts within its first ``max_record_bytes`` it was a bogus header (damage,
  as above); otherwise the bytes up to the next valid tick record are one
  ``too_large`` reject.
- Bytes at the end of input that do not complete a value and hold no later valid
  record are one ``truncated`` reject.

The usual record takes none of these paths: the record scanner
(:mod:`barsmith.ingest.fastwire`) accepts it in one call, and the rules above run only
for records the scanner does not take, which in a clean feed are rare.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import IO, Any, Final

import msgpack

from barsmith.errors import describe_error
from barsmith.ingest.fastwire import INCOMPLETE, NOT_SIMPLE, new_scanner
from barsmith.ingest.framed import (
    BLOCK_TARGET_BYTES,
    FILE_HEADER_BYTES,
    FILE_MAGIC,
    BlockReader,
    check_version,
    read_file_header,
)
from barsmith.ingest.ticks import MalformedTickError, RejectReason, Tick, decode_tick

READ_BLOCK_BYTES: Final = 1 << 20
# A record (one msgpack value: a tick map or a whole batch) larger than this is
# rejected as too_large; the reader never buffers much more than this.
DEFAULT_MAX_RECORD_BYTES: Final = 4 << 20
# Plausibility limits that make a corrupt count fail fast (msgpack allocates a
# container's slots from its header): a tick map has a handful of keys.
MAX_ARRAY_ITEMS: Final = 1_000_000
MAX_MAP_ITEMS: Final = 4096
# A reject keeps at most this much of the raw bytes it skipped.
MAX_KEPT_BYTES: Final = 4096
# The first decode window of a record the scanner did not take (a tick is ~100 bytes).
FIRST_WINDOW_BYTES: Final = 512
# An array is decoded in one piece up to this size (a batch of some hundred ticks);
# a longer one item by item, so that garbage with an array header stops early.
WHOLE_ARRAY_BYTES: Final = 64 * 1024
# A tick map is looked for (as the place to resume after damage, or inside a value
# that may hold one) only up to this size: garbage that could start one would
# otherwise cost a decode of every record it swallows.
SCAN_TICK_BYTES: Final = 4096
# How many malformed values in a row may precede a record boundary and still count
# as records (beyond that they are taken as records without looking further).
CHAIN_VALUES: Final = 16

# Where a tick map can start: a map header with room for the four required keys.
_TICK_START: Final = re.compile(b"[\x84-\x8f\xde\xdf]")
_ARRAY_HEADERS: Final = frozenset([*range(0x90, 0xA0), 0xDC, 0xDD])
# The wire format's keys. A valid tick with only these holds no map inside it: its values are
# scalars, and its depth levels (bids, asks) arrays of numbers.
_WIRE_KEYS: Final = frozenset(
    ("sym", "ts", "seq", "kind", "bid_px", "bid_qty", "ask_px", "ask_qty", "trade_px", "trade_qty", "bids", "asks")
)
_DECODE_ERRORS: Final = (msgpack.exceptions.UnpackException, ValueError, TypeError)

# Answers about one position (>= 0: where what was found ends).
_NO: Final = -1  # not what was looked for (or not msgpack)
_MORE: Final = -2  # cannot tell without more bytes
_BIG: Final = -3  # a value longer than max_record_bytes
_CUT: Final = -4  # a value cut short by the end of input
_INNER: Final = -5  # a value that holds the start of a valid tick (given with it)
# What a look-ahead found at a record boundary.
_RECORD: Final = 1
_VALUE: Final = 2


@dataclass(slots=True)
class FramingReject:
    """Bytes at ``offset`` that did not decode as a msgpack record."""

    offset: int
    reason: RejectReason
    detail: str
    raw: bytes
    size: int = 0  # how many bytes of the stream it stands for


class _Span:
    """Damaged bytes being skipped: where they start and end, and the first of them."""

    __slots__ = ("end", "offset", "raw", "reason", "why")

    def __init__(self, offset: int, why: str) -> None:
        self.offset = offset
        self.end = offset
        self.why = why
        self.reason = RejectReason.NOT_MSGPACK
        self.raw = bytearray()

    def add(self, data: bytes, start: int, stop: int) -> None:
        room = MAX_KEPT_BYTES - len(self.raw)
        if room > 0:
            self.raw += data[start : min(stop, start + room)]
        self.end += stop - start

    def absorb(self, later: _Span) -> None:
        room = MAX_KEPT_BYTES - len(self.raw)
        if room > 0:
            self.raw += later.raw[:room]
        self.end = later.end

    def as_reject(self) -> FramingReject:
        size = self.end - self.offset
        if self.reason is RejectReason.TRUNCATED:
            detail = f"last record is incomplete: {size} bytes at end of input"
        else:
            detail = f"{size} bytes skipped ({self.why})"
        return FramingReject(self.offset, self.reason, detail, bytes(self.raw), size)


class RepeatedKeyError(ValueError):
    """A msgpack map that names one key twice."""


def unique_keys(pairs: list[tuple[Any, Any]]) -> dict[Any, Any]:
    """A decoded map's pairs as a dict, refusing a key named twice. msgpack itself keeps
    the last value; barsmith cannot tell which one the sender meant, and in a damaged
    file such a map is often two records run together (damage that began a map, whose
    count then took in the pairs of the valid record after it), so it is not a record."""
    result = dict(pairs)
    if len(result) != len(pairs):
        seen: set[Any] = set()
        for key, _ in pairs:
            if key in seen:
                raise RepeatedKeyError(f"a map names the key {key!r} twice")
            seen.add(key)
    return result


def unpack_value(value: bytes) -> Any:
    """One whole msgpack value under barsmith's rules (each map key once); raises
    ValueError (or msgpack's own errors) otherwise. For a Kafka record value."""
    return msgpack.unpackb(value, raw=False, strict_map_key=False, object_pairs_hook=unique_keys)


def new_unpacker(max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES) -> msgpack.Unpacker:
    """An unpacker with barsmith's limits and rules (each map key once; also used for
    Kafka record values)."""
    return msgpack.Unpacker(
        raw=False,
        strict_map_key=False,
        object_pairs_hook=unique_keys,
        max_buffer_size=max_record_bytes,
        max_str_len=max_record_bytes,
        max_bin_len=max_record_bytes,
        max_array_len=min(MAX_ARRAY_ITEMS, max_record_bytes),
        max_map_len=MAX_MAP_ITEMS,
        max_ext_len=max_record_bytes,
    )


class FrameReader:
    """Decode a binary stream into batches of ``(records, offsets, rejects)``.

    Records of the usual shape are decoded straight into :class:`Tick` objects (or
    lists of them, for a batched record) by the record scanner
    (:mod:`barsmith.ingest.fastwire`), or, without it, by msgpack and the validator;
    any other record is handed on as plain decoded objects, which the engine
    validates the general way. Offsets are where each record starts. See the module
    docstring for what happens to damaged bytes.
    """

    def __init__(
        self,
        stream: IO[bytes],
        block_bytes: int = READ_BLOCK_BYTES,
        max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES,
        use_scanner: bool = True,
    ) -> None:
        """``use_scanner=False`` decodes every record the general way (as a build
        without the C scanner does; for tests and benchmarks)."""
        self._stream = stream
        self._block_bytes = block_bytes
        self._max_record = max_record_bytes
        self._buf = b""
        self._base = 0  # absolute offset of _buf[0]
        self._pos = 0  # next record's index in _buf
        self._eof = False  # nothing more can be appended to _buf
        self._done = False
        self._started = False
        self._scanner = new_scanner() if use_scanner else None
        self._blocks: BlockReader | None = None  # set for a framed recording
        # The current stretch is a block payload its check value vouches for: its bytes are
        # what was written, so a value that is no tick is a record as it stands, not damage.
        self._verified = False
        self._pending: _Span | None = None  # damage not yet reported (a later span may join it)
        self._confirmed = 0  # values starting before this offset are known to be records
        # A record that cannot hold another can still be garbage whose last value runs
        # into the record after it (a cut record whose float takes the next record's
        # first bytes). That shows only at the bytes after it, which are then no
        # record: so the last such record is kept retractable until its successor is
        # seen -- its start (-1: none), and, across batches, the record itself.
        self._prev_start = -1
        self._held: tuple[Any, int] | None = None

    @property
    def done(self) -> bool:
        """True once the stream is exhausted and every byte accounted for."""
        return self._done

    @property
    def framed(self) -> bool:
        """Whether the stream is a framed recording (known after the first batch)."""
        return self._blocks is not None

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
        if not self._started:
            self._start(rejects)
        held = self._held
        if held is not None:
            # The held record does not count: the batch must look past it.
            objects.append(held[0])
            offsets.append(held[1])
            self._held = None
            max_records += 1
        scanner = self._scanner
        max_bytes = self._max_record
        while len(objects) < max_records and not self._done:
            buf = self._buf
            pos = self._pos
            base = self._base
            end = len(buf)
            last = -1
            # Without a scanner every record takes the general path below.
            result = INCOMPLETE if scanner is not None else NOT_SIMPLE
            if scanner is not None and pos < end and len(objects) < max_records:
                # The hot loop, in C: records of the usual shape, until one is not.
                pos, result, last = scanner.scan_records(
                    buf, pos, max_records - len(objects), max_bytes, base, objects, offsets
                )
            self._pos = pos
            if last >= 0 and not self._verified:
                self._prev_start = base + last
            if len(objects) >= max_records:
                break
            if pos >= end:
                if not self._refill():
                    self._next_segment(rejects)
                continue
            if result == INCOMPLETE and end - pos <= max_bytes and self._refill():
                continue
            self._general_record(objects, offsets, rejects)
        retractable = self._prev_start
        if not self._done and objects and offsets[-1] == retractable:
            self._held = (objects.pop(), offsets.pop())
        # Damage can still grow where the next record starts, or where a retractable
        # record starts; otherwise it is final.
        pending = self._pending
        if pending is not None and (
            self._done or (pending.end < self._base + self._pos and pending.end != retractable)
        ):
            self._flush_pending(rejects)
        return objects, offsets, rejects

    # -- buffering -------------------------------------------------------------------

    def _start(self, rejects: list[FramingReject]) -> None:
        """Read the first bytes and tell a framed recording from a plain feed."""
        self._started = True
        head = b""
        while len(head) < FILE_HEADER_BYTES:
            chunk = self._stream.read(self._block_bytes)
            if not chunk:
                self._eof = True
                break
            head += chunk
        if not head.startswith(FILE_MAGIC):
            self._buf = head
            return
        version = read_file_header(head)
        if version is None:
            detail = "the framed recording's file header is damaged or cut short; read as version 1"
            reason = RejectReason.BAD_BLOCK if len(head) >= FILE_HEADER_BYTES else RejectReason.TRUNCATED
            rejects.append(
                FramingReject(0, reason, detail, head[:FILE_HEADER_BYTES], min(len(head), FILE_HEADER_BYTES))
            )
        else:
            check_version(version)
        self._blocks = BlockReader(
            self._stream,
            head[FILE_HEADER_BYTES:],
            FILE_HEADER_BYTES,
            self._block_bytes,
            max(self._max_record, BLOCK_TARGET_BYTES),
        )
        self._eof = True
        self._buf = b""

    def _refill(self) -> bool:
        """Append the next block to what is left of the buffer; False at end of stream
        (and always for a framed recording, whose segments are read whole)."""
        if self._eof:
            return False
        block = self._stream.read(self._block_bytes)
        if not block:
            self._eof = True
            return False
        keep = self._pos
        if self._prev_start >= self._base:
            keep = self._prev_start - self._base  # the retractable record stays readable
        self._buf = self._buf[keep:] + block
        self._base += keep
        self._pos -= keep
        return True

    def _next_segment(self, rejects: list[FramingReject]) -> None:
        """The current stretch is used up: the next block of a framed recording, or done."""
        self._flush_pending(rejects)
        if self._blocks is None:
            self._done = True
            return
        while True:
            segment = self._blocks.next_segment()
            if segment is None:
                self._done = True
                return
            problem = segment.problem
            if problem is not None:
                rejects.append(FramingReject(problem.offset, problem.reason, problem.detail, problem.raw, problem.size))
            if segment.data:
                break
        self._buf = segment.data
        self._base = segment.offset
        self._pos = 0
        self._confirmed = 0
        self._prev_start = -1
        self._verified = segment.problem is None

    # -- records the scanner did not take ----------------------------------------------

    def _general_record(self, objects: list[Any], offsets: list[int], rejects: list[FramingReject]) -> None:
        """Take the record at the current position, or skip the damage there."""
        while self._take_record(objects, offsets, rejects) == _MORE:
            # Reading on changes nothing at the end of input: the next try decides.
            self._refill()

    def _take_record(self, objects: list[Any], offsets: list[int], rejects: list[FramingReject]) -> int:
        """One step at the current position: 0 done, or _MORE (read on and try again)."""
        pos = self._pos
        max_bytes = self._max_record
        declared = _declared_size(self._buf, pos)
        decoded: tuple[int, Any, Any] = (_BIG, None, None) if declared > max_bytes else self._decode_record(pos)
        end, obj, record = decoded
        if end == _MORE:
            return _MORE
        if self._verified and end >= 0:
            # Undamaged bytes: whatever the value is, it is one record; the engine judges it.
            objects.append(record if record is not None else obj)
            offsets.append(self._base + pos)
            self._prev_start = -1
            self._pos = end
            return 0
        if record is None and not (end >= 0 and (_valid_tick(obj) or _valid_batch(obj))):
            # No record here: was the record before it garbage running into one?
            retracted = self._retract(objects, offsets, rejects)
            if retracted != 0:
                return retracted if retracted == _MORE else 0
        if end == _INNER:
            inner: int = obj
            return self._skip_to(inner, "a value that runs into a later record", rejects)
        if end == _NO:
            return self._skip(str(obj), rejects)
        if end == _BIG:
            size = f"{declared:,} bytes or more" if declared > max_bytes else f"more than {max_bytes:,} bytes"
            return self._skip(f"a value of {size}, above max_record_bytes {max_bytes:,}", rejects, too_large=True)
        if end == _CUT:
            return self._skip("a value cut short before a later record", rejects, tail=True)
        if record is None:
            # Not a record that cannot hold another: no valid tick may start inside it.
            batch = _valid_batch(obj)
            inner = self._tick_inside_batch(pos, end) if batch else self._tick_inside(pos + 1, end)
            if inner == _MORE:
                return _MORE
            if inner >= 0:
                return self._skip_to(inner, "a value that runs into a later record", rejects)
            if not batch and not _valid_tick(obj):
                boundary = self._boundary_after(end)
                if boundary == _MORE:
                    return _MORE
                if boundary == _NO:
                    return self._skip("a value followed by bytes that are not records", rejects)
            record = obj
            # A batch's last item can be a record cut inside its last number that took the
            # next record's first bytes: the batch stays retractable, as a clean record does.
            self._prev_start = self._base + pos if batch else -1
        else:
            self._prev_start = self._base + pos
        objects.append(record)
        offsets.append(self._base + pos)
        self._pos = end
        return 0

    def _decode_record(self, at: int) -> tuple[int, Any, Any]:
        """The value at ``_buf[at]``: (end, object, the record as the scanner gives it
        or None), or an answer of :meth:`_decode_array` / :meth:`_decode_at`."""
        if self._buf[at] in _ARRAY_HEADERS:
            end, obj = self._decode_at(at, min(self._max_record, WHOLE_ARRAY_BYTES))
            if end == _BIG:
                return self._decode_array(at)
        else:
            end, obj = self._decode_at(at, self._max_record)
        return end, obj, (_clean(obj) if end >= 0 else None)

    def _decode_array(self, at: int) -> tuple[int, Any, Any]:
        """Decode a long array item by item, stopping as soon as it is clear that it is
        no batch and holds a valid tick: then (_INNER, where that tick starts, None).
        Garbage with an array header would otherwise make this decode megabytes of
        the records after it, only to reject them."""
        buf = self._buf
        max_bytes = self._max_record
        reach = min(len(buf) - at, max_bytes)
        window = WHOLE_ARRAY_BYTES * 2
        while True:
            size = min(window, reach)
            unpacker = new_unpacker(max_bytes)
            unpacker.feed(buf[at : at + size])
            items: list[Any] = []
            ticks: list[Tick] | None = []
            first_tick = -1  # where the first valid item starts
            seen_bad = False
            try:
                count = unpacker.read_array_header()
                inner = self._tick_inside(at + 1, at + unpacker.tell())  # the header's own bytes
                if inner != _NO:
                    return (_INNER, inner, None) if inner >= 0 else (_MORE, None, None)
                for _ in range(count):
                    start = at + unpacker.tell()
                    item = unpacker.unpack()
                    tick = _clean_tick(item) if type(item) is dict else None
                    if tick is not None or _valid_tick(item):
                        if seen_bad:
                            return _INNER, start, None
                        if first_tick < 0:
                            first_tick = start
                    else:
                        if first_tick >= 0:
                            return _INNER, first_tick, None
                        seen_bad = True
                        inner = self._tick_inside(start, at + unpacker.tell())
                        if inner == _MORE:
                            return _MORE, None, None
                        if inner >= 0:
                            return _INNER, inner, None
                    items.append(item)
                    if ticks is not None:
                        if tick is None:
                            ticks = None
                        else:
                            ticks.append(tick)
            except msgpack.exceptions.OutOfData:
                if size < reach:
                    window *= 8
                    continue
                if size >= max_bytes:
                    return _BIG, None, None
                return (_CUT if self._eof else _MORE), None, None
            except _DECODE_ERRORS as exc:
                return _NO, f"{type(exc).__name__}: {exc}", None
            return at + unpacker.tell(), items, (ticks if ticks else None)

    def _retract(self, objects: list[Any], offsets: list[int], rejects: list[FramingReject]) -> int:
        """If the record just before the current position holds the start of a valid
        tick, it was damage: take it back and skip to that tick. 1 taken back, 0 not,
        _MORE."""
        start = self._prev_start
        if start < 0 or not offsets or offsets[-1] != start:
            return 0
        at = start - self._base
        record = objects[-1]
        items = _item_starts(self._buf, at, self._pos, self._max_record) if type(record) is list else None
        inner = self._straddling_tick(at + 1, self._pos, items)
        if inner == _MORE:
            return _MORE
        self._prev_start = -1
        if inner < 0:
            return 0
        objects.pop()
        offsets.pop()
        self._pos = at
        self._skip_to(inner, "a record whose last value runs into a later record", rejects)
        return 1

    def _decode_at(self, at: int, limit: int) -> tuple[int, Any]:
        """Decode the value at ``_buf[at]``, if it ends within ``limit`` bytes: (its end,
        the object), or (_NO, why), (_MORE, None), (_BIG, None: longer than ``limit``),
        (_CUT, None: cut short by the end of input)."""
        buf = self._buf
        reach = min(len(buf) - at, limit)
        max_bytes = self._max_record
        window = FIRST_WINDOW_BYTES
        while True:
            size = min(window, reach)
            unpacker = new_unpacker(max_bytes)
            unpacker.feed(buf[at : at + size])
            try:
                obj = unpacker.unpack()
            except msgpack.exceptions.OutOfData:
                if size < reach:
                    window *= 8
                    continue
                if size >= limit:
                    return _BIG, None
                return (_CUT if self._eof else _MORE), None
            except _DECODE_ERRORS as exc:
                return _NO, describe_error(exc)
            return at + unpacker.tell(), obj

    def _tick_end(self, at: int) -> int:
        """Where a valid tick record starting at ``_buf[at]`` ends; _NO or _MORE."""
        return self._tick_at(at)[0]

    def _tick_at(self, at: int) -> tuple[int, bool]:
        """Where a valid tick record starting at ``_buf[at]`` ends (_NO, _MORE), and
        whether it has only wire-format keys."""
        scanner = self._scanner
        if scanner is not None:
            result = scanner.scan_record(self._buf, at)
            if result >= 0:
                return (result, True) if scanner.batch is None else (_NO, False)
        end, obj = self._decode_at(at, SCAN_TICK_BYTES)
        if end >= 0:
            if type(obj) is not dict:
                return _NO, False
            if _clean_tick(obj) is not None:
                return end, True
            return (end, False) if _valid_tick(obj) else (_NO, False)
        return (_MORE if end == _MORE else _NO), False

    def _straddling_tick(self, start: int, end: int, allowed: set[int] | None) -> int:
        """The first position in [start, end) (other than the ``allowed`` ones) where a
        valid tick starts that runs past ``end`` and is itself a record: one with
        only wire-format keys, or one that holds no other tick's start. _NO or _MORE."""
        for found in _TICK_START.finditer(self._buf, start, end):
            at = found.start()
            if allowed is not None and at in allowed:
                continue
            tick_end, clean = self._tick_at(at)
            if tick_end == _MORE:
                return _MORE
            if tick_end > end:
                if clean:
                    return at
                inner = self._tick_inside(at + 1, tick_end)
                if inner == _MORE:
                    return _MORE
                if inner == _NO:
                    return at
        return _NO

    def _tick_inside(self, start: int, end: int) -> int:
        """The first position in [start, end) where a valid tick record starts; _NO or _MORE."""
        for found in _TICK_START.finditer(self._buf, start, end):
            tick_end = self._tick_end(found.start())
            if tick_end != _NO:
                return found.start() if tick_end >= 0 else _MORE
        return _NO

    def _tick_inside_batch(self, at: int, end: int) -> int:
        """The first position inside the batch at ``_buf[at:end]`` where a valid tick
        starts that is not one of its items: in its header's bytes, or inside an item
        that can hold one. An item with only wire-format keys holds scalars only, so a
        tick map header among its bytes (a float's byte, say) starts nothing it holds,
        as for such a record on its own. _NO or _MORE."""
        unpacker = new_unpacker(self._max_record)
        unpacker.feed(self._buf[at:end])
        count = unpacker.read_array_header()
        inner = self._tick_inside(at + 1, at + unpacker.tell())
        for _ in range(count):
            if inner != _NO:
                break
            start = at + unpacker.tell()
            item = unpacker.unpack()
            if not _WIRE_KEYS.issuperset(item):
                inner = self._tick_inside(start + 1, at + unpacker.tell())
        return inner

    def _boundary_after(self, at: int) -> int:
        """Whether ``_buf[at]`` is a record boundary: a valid record, the end of input,
        or up to CHAIN_VALUES decodable values ending in one. 1, _NO or _MORE."""
        if self._base + at <= self._confirmed:
            return 1
        for _ in range(CHAIN_VALUES):
            if at >= len(self._buf):
                if not self._eof:
                    return _MORE
                break
            kind, after = self._look(at)
            if kind == _MORE:
                return _MORE
            if kind == _NO:
                return _NO
            if kind != _VALUE:
                break
            # A value that runs into a record is damage, not a boundary.
            inner = self._tick_inside(at + 1, after)
            if inner != _NO:
                return _MORE if inner == _MORE else _NO
            at = after
        self._confirmed = self._base + at
        return 1

    def _look(self, at: int) -> tuple[int, int]:
        """What starts at ``_buf[at]``: (_RECORD, end), (_VALUE, end), (_CUT, 0) at the
        end of input, (_NO, 0) for bytes that do not decode or are too long, (_MORE, 0)."""
        scanner = self._scanner
        if scanner is not None:
            result = scanner.scan_record(self._buf, at)
            if result >= 0:
                return _RECORD, result
        end, obj, record = self._decode_record(at)
        if end >= 0:
            return (_RECORD if record is not None or _valid_tick(obj) or _valid_batch(obj) else _VALUE), end
        if end in (_MORE, _CUT):
            return end, 0
        return _NO, 0

    # -- damage ------------------------------------------------------------------------

    def _skip(self, why: str, rejects: list[FramingReject], too_large: bool = False, tail: bool = False) -> int:
        """The bytes from the current position up to the next valid tick record (or
        the end of input) are damage; read on as far as needed, holding little."""
        span = _Span(self._base + self._pos, why)
        at = self._pos + 1
        while True:
            buf = self._buf
            found = _TICK_START.search(buf, at)
            cut = len(buf) if found is None else found.start()
            tick_end = _NO
            if found is not None:
                tick_end = self._tick_end(cut)
                if tick_end == _NO:
                    at = cut + 1
                    continue
            span.add(buf, self._pos, cut)
            self._pos = cut
            if tick_end >= 0 or (not self._refill() and found is None):
                break
            at = self._pos
        at_end = self._pos >= len(self._buf)
        if too_large and (at_end or span.end - span.offset > self._max_record):
            span.reason = RejectReason.TOO_LARGE
        elif tail and at_end:
            span.reason = RejectReason.TRUNCATED
        self._close_span(span, rejects)
        return 0

    def _skip_to(self, at: int, why: str, rejects: list[FramingReject]) -> int:
        """``_buf[_pos:at]`` is damage (a valid tick record starts at ``at``)."""
        span = _Span(self._base + self._pos, why)
        span.add(self._buf, self._pos, at)
        self._pos = at
        self._close_span(span, rejects)
        return 0

    def _close_span(self, span: _Span, rejects: list[FramingReject]) -> None:
        """Damage right after damage of the same kind is one span."""
        self._confirmed = 0
        self._prev_start = -1
        pending = self._pending
        if pending is not None and pending.end == span.offset and pending.reason is span.reason:
            pending.absorb(span)
            return
        self._flush_pending(rejects)
        self._pending = span

    def _flush_pending(self, rejects: list[FramingReject]) -> None:
        if self._pending is not None:
            rejects.append(self._pending.as_reject())
            self._pending = None


def _declared_size(buf: bytes, at: int) -> int:
    """A lower bound of the size of the value at ``buf[at]`` read from its header
    alone (strings, binaries, extensions, big arrays and maps); 0 when unknown."""
    if at >= len(buf):
        return 0
    head = buf[at]
    if head < 0xC4:  # maps, arrays, small values: the usual record ends here
        return 0
    if head in (0xC4, 0xC7, 0xD9):  # bin8, ext8, str8
        width = 1
    elif head in (0xC5, 0xC8, 0xDA, 0xDC, 0xDE):  # bin16, ext16, str16, array16, map16
        width = 2
    elif head in (0xC6, 0xC9, 0xDB, 0xDD, 0xDF):  # bin32, ext32, str32, array32, map32
        width = 4
    else:
        return 0
    if at + 1 + width > len(buf):
        return 0
    length = int.from_bytes(buf[at + 1 : at + 1 + width], "big")
    if head in (0xDE, 0xDF):
        length *= 2  # a key and a value, at least a byte each
    return 1 + width + length


def _clean_tick(obj: Any) -> Tick | None:
    """The tick of a map with only wire-format keys that passes validation."""
    d: dict[Any, Any] = obj
    if not _WIRE_KEYS.issuperset(d):
        return None
    try:
        return decode_tick(d)
    except MalformedTickError:
        return None


def _clean(obj: Any) -> Any:
    """The record as the scanner gives it (a Tick, or a list of them) when ``obj`` is a
    tick map with only wire-format keys, or a non-empty array of such maps; else None."""
    if type(obj) is dict:
        return _clean_tick(obj)
    if type(obj) is list and obj:
        items: list[Any] = obj
        ticks: list[Tick] = []
        for item in items:
            tick = _clean_tick(item) if type(item) is dict else None
            if tick is None:
                return None
            ticks.append(tick)
        return ticks
    return None


def _valid_tick(obj: Any) -> bool:
    if type(obj) is not dict:
        return False
    try:
        decode_tick(obj)
    except MalformedTickError:
        return False
    return True


def _valid_batch(obj: Any) -> bool:
    """A non-empty array whose items are all valid ticks."""
    if type(obj) is not list or not obj:
        return False
    items: list[Any] = obj
    return all(_valid_tick(item) for item in items)


def _item_starts(buf: bytes, at: int, end: int, max_bytes: int) -> set[int]:
    """Where the items of the array at ``buf[at:end]`` start."""
    unpacker = new_unpacker(max_bytes)
    unpacker.feed(buf[at:end])
    starts: set[int] = set()
    for _ in range(unpacker.read_array_header()):
        starts.add(at + unpacker.tell())
        unpacker.skip()
    return starts
