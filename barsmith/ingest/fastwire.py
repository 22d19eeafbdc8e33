"""A direct decoder for the common shape of a tick: msgpack bytes → :class:`Tick`.

Decoding a map with msgpack builds a dict, key strings and float objects, and the
validator then reads them back. For the usual message — a map whose keys are the
wire format's own, with string, integer, float or nil values — this module reads
the bytes once and fills a :class:`Tick` directly. It is compiled with mypyc.

It accepts a record only when every field passes exactly the checks of
:func:`barsmith.ingest.ticks.decode_tick`; anything else (an unknown key, an
unusual type, a bad value, a cut-off record) makes :meth:`WireScanner.scan` return
``NOT_SIMPLE`` or ``INCOMPLETE``, and the caller decodes that record the general
way, which gives the same answer and a precise reject reason. So the fast path can
only be faster, never different (a property test pins this).
"""

from __future__ import annotations

import math
import struct
from typing import Final

from barsmith.ingest.ticks import ASK_PX, ASK_QTY, BID_PX, BID_QTY, MAX_INT64, MAX_SYMBOL_CHARS, Tick

NOT_SIMPLE: Final = -1  # decode this record the general way
INCOMPLETE: Final = -2  # the record runs past the end of the buffer

_unpack_double = struct.Struct(">d").unpack_from
_unpack_float = struct.Struct(">f").unpack_from
_INF: Final = math.inf

# Field codes, from the key bytes.
_K_SYM: Final = 1
_K_TS: Final = 2
_K_SEQ: Final = 3
_K_KIND: Final = 4
_K_BID_PX: Final = 5
_K_BID_QTY: Final = 6
_K_ASK_PX: Final = 7
_K_ASK_QTY: Final = 8
_K_TRADE_PX: Final = 9
_K_TRADE_QTY: Final = 10


# Value kinds read by _value().
_V_NIL: Final = 0
_V_INT: Final = 1
_V_FLOAT: Final = 2
_V_STR: Final = 3


class WireScanner:
    """Scans one record at a time. After a successful :meth:`scan`, :attr:`tick` holds it."""

    def __init__(self) -> None:
        self.tick: Tick | None = None
        self.batch: list[Tick] | None = None
        # The last value read by _value(): its kind, and the matching field.
        self._kind = 0
        self._int = 0
        self._float = 0.0
        self._str = ""
        self._str_ok = False  # _str is a well-formed symbol (1-64 printable characters)
        self._symbols: dict[bytes, str] = {}

    def scan_record(self, data: bytes, pos: int) -> int:
        """Like :meth:`scan`, but also takes an array of simple ticks (a batched
        record); then :attr:`batch` holds the ticks and :attr:`tick` is None."""
        self.batch = None
        header = data[pos] if pos < len(data) else 0
        if 0x90 <= header <= 0x9F or header == 0xDC:
            if header == 0xDC:
                if pos + 3 > len(data):
                    return INCOMPLETE
                count = (data[pos + 1] << 8) | data[pos + 2]
                pos += 3
            else:
                count = header - 0x90
                pos += 1
            if count == 0:
                return NOT_SIMPLE
            ticks: list[Tick] = []
            for _ in range(count):
                pos = self.scan(data, pos)
                if pos < 0:
                    return pos
                assert self.tick is not None
                ticks.append(self.tick)
            self.batch = ticks
            self.tick = None
            return pos
        return self.scan(data, pos)

    def scan(self, data: bytes, pos: int) -> int:
        """Decode the record at ``data[pos]``; returns the position after it, or
        ``NOT_SIMPLE`` / ``INCOMPLETE``."""
        end = len(data)
        if pos >= end:
            return INCOMPLETE
        header = data[pos]
        if header < 0x80 or header > 0x8F:
            return NOT_SIMPLE  # not a fixmap (a batch, a big map, or not a map at all)
        count = header - 0x80
        pos += 1
        sym = ""
        ts = -1
        seq = -1
        is_snapshot = False
        kind_seen = False
        present = 0
        bid_px: float | None = None
        bid_qty: float | None = None
        ask_px: float | None = None
        ask_qty: float | None = None
        trade_px: float | None = None
        trade_qty: float | None = None
        for _ in range(count):
            if pos >= end:
                return INCOMPLETE
            key_header = data[pos]
            if key_header < 0xA0 or key_header > 0xBF:
                return NOT_SIMPLE
            key_end = pos + 1 + (key_header - 0xA0)
            if key_end > end:
                return INCOMPLETE
            field = _field(data, pos + 1, key_end - pos - 1)
            if field == 0:
                return NOT_SIMPLE  # an unknown key: let the general path skip it
            pos = self._value(data, key_end, end)
            if pos < 0:
                return pos
            kind = self._kind
            if field == _K_SYM:
                if kind != _V_STR or not self._str_ok:
                    return NOT_SIMPLE
                sym = self._str
            elif field == _K_TS:
                if kind != _V_INT or not 0 < self._int <= MAX_INT64:
                    return NOT_SIMPLE
                ts = self._int
            elif field == _K_SEQ:
                if kind != _V_INT or not 0 <= self._int <= MAX_INT64:
                    return NOT_SIMPLE
                seq = self._int
            elif field == _K_KIND:
                if kind != _V_STR:
                    return NOT_SIMPLE
                if self._str == "delta":
                    is_snapshot = False
                elif self._str == "snapshot":
                    is_snapshot = True
                else:
                    return NOT_SIMPLE
                kind_seen = True
            else:
                # Prices > 0, quantities >= 0 (trade quantity > 0), finite; nil allowed
                # for the quote fields. A trade's nil means "no trade field".
                if kind == _V_NIL:
                    number: float | None = None
                elif kind in (_V_FLOAT, _V_INT):
                    value = self._float if kind == _V_FLOAT else float(self._int)
                    if not value < _INF:
                        return NOT_SIMPLE
                    strictly_positive = field in (_K_BID_PX, _K_ASK_PX, _K_TRADE_PX, _K_TRADE_QTY)
                    if not (value > 0.0 if strictly_positive else value >= 0.0):
                        return NOT_SIMPLE
                    number = value
                else:
                    return NOT_SIMPLE
                if field == _K_BID_PX:
                    bid_px = number
                    present |= BID_PX
                elif field == _K_BID_QTY:
                    bid_qty = number
                    present |= BID_QTY
                elif field == _K_ASK_PX:
                    ask_px = number
                    present |= ASK_PX
                elif field == _K_ASK_QTY:
                    ask_qty = number
                    present |= ASK_QTY
                elif field == _K_TRADE_PX:
                    trade_px = number
                else:
                    trade_qty = number
        if ts < 0 or seq < 0 or not kind_seen or not sym:
            return NOT_SIMPLE
        if (trade_px is None) != (trade_qty is None):
            return NOT_SIMPLE
        self.tick = Tick(sym, ts, seq, is_snapshot, present, bid_px, bid_qty, ask_px, ask_qty, trade_px, trade_qty)
        return pos

    def _value(self, data: bytes, pos: int, end: int) -> int:
        """Read one scalar at ``pos`` into the _kind/_int/_float/_str slots."""
        if pos >= end:
            return INCOMPLETE
        code = data[pos]
        if code <= 0x7F:
            self._kind = _V_INT
            self._int = code
            return pos + 1
        if 0xA0 <= code <= 0xBF:
            return self._string(data, pos + 1, code - 0xA0, end)
        if code == 0xCB:
            if pos + 9 > end:
                return INCOMPLETE
            self._kind = _V_FLOAT
            self._float = _unpack_double(data, pos + 1)[0]
            return pos + 9
        if code == 0xC0:
            self._kind = _V_NIL
            return pos + 1
        if 0xCC <= code <= 0xCF:
            size = 1 << (code - 0xCC)
            if pos + 1 + size > end:
                return INCOMPLETE
            value = 0
            for i in range(pos + 1, pos + 1 + size):
                value = (value << 8) | data[i]
            self._kind = _V_INT
            self._int = value
            return pos + 1 + size
        if code == 0xCA:
            if pos + 5 > end:
                return INCOMPLETE
            self._kind = _V_FLOAT
            self._float = _unpack_float(data, pos + 1)[0]
            return pos + 5
        if code == 0xD9:
            if pos + 2 > end:
                return INCOMPLETE
            return self._string(data, pos + 2, data[pos + 1], end)
        return NOT_SIMPLE  # negative ints, bools, bin, arrays, maps, ext: the general path

    def _string(self, data: bytes, start: int, size: int, end: int) -> int:
        stop = start + size
        if stop > end:
            return INCOMPLETE
        raw = data[start:stop]
        known = self._symbols.get(raw)
        self._kind = _V_STR
        if known is not None:
            self._str = known
            self._str_ok = True
            return stop
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            return NOT_SIMPLE
        # Only well-formed symbols are cached (and "delta"/"snapshot", which pass too).
        ok = 0 < len(text) <= MAX_SYMBOL_CHARS and text.isprintable()
        if ok and len(self._symbols) < 100_000:
            self._symbols[raw] = text
        self._str = text
        self._str_ok = ok
        return stop


def _is(data: bytes, start: int, word: bytes) -> bool:
    """Whether ``data[start:start+len(word)] == word``, without slicing."""
    # An explicit loop on purpose: compiled, it is native byte compares; all() over a
    # generator would allocate.
    for i in range(len(word)):  # noqa: SIM110
        if data[start + i] != word[i]:
            return False
    return True


def _field(data: bytes, start: int, size: int) -> int:
    """The field code of the key bytes at ``data[start:start+size]`` (0 = not ours).
    Dispatches on length and first byte, then checks every byte: no allocation."""
    first = data[start] if size else 0
    if size == 3:
        if _is(data, start, b"sym"):
            return _K_SYM
        if _is(data, start, b"seq"):
            return _K_SEQ
    elif size == 2:
        if _is(data, start, b"ts"):
            return _K_TS
    elif size == 4:
        if _is(data, start, b"kind"):
            return _K_KIND
    elif size == 6:
        if first == 0x62 and _is(data, start, b"bid_px"):
            return _K_BID_PX
        if first == 0x61 and _is(data, start, b"ask_px"):
            return _K_ASK_PX
    elif size == 7:
        if first == 0x62 and _is(data, start, b"bid_qty"):
            return _K_BID_QTY
        if first == 0x61 and _is(data, start, b"ask_qty"):
            return _K_ASK_QTY
    elif size == 8:
        if _is(data, start, b"trade_px"):
            return _K_TRADE_PX
    elif size == 9 and _is(data, start, b"trade_qty"):
        return _K_TRADE_QTY
    return 0
