"""The tick wire format: one msgpack map per message, validated into a :class:`Tick`.

Keys (see the README for the table): ``sym``, ``ts`` (ns since the epoch, UTC),
``seq``, ``kind`` (``"delta"`` / ``"snapshot"``), optional ``bid_px``, ``bid_qty``,
``ask_px``, ``ask_qty`` (a number, or nil to clear that side), the pair
``trade_px`` / ``trade_qty``, and depth levels ``bids`` / ``asks`` (lists of
``[px, qty]`` pairs: in a snapshot the whole side, in a delta the changed levels, qty
0 removing one). A side is given by levels or by top-of-book fields, never both in
one message (``mixed_book``). Unknown keys are ignored.

A record that breaks the format never raises past :func:`decode_tick`'s caller: it
raises :class:`MalformedTickError` carrying a :class:`RejectReason`, which the engine
counts and writes to the rejects file.
"""

from __future__ import annotations

import enum
import math
from typing import Any, Final

# Bits of Tick.present: which quote fields the message carried (a nil counts as
# carried -- it clears that side; an absent key leaves a delta's side unchanged).
BID_PX: Final = 1
BID_QTY: Final = 2
ASK_PX: Final = 4
ASK_QTY: Final = 8
ALL_QUOTE_FIELDS: Final = BID_PX | BID_QTY | ASK_PX | ASK_QTY

MAX_SYMBOL_CHARS: Final = 64
# Timestamps and sequence numbers are stored as signed 64-bit integers (Parquet INT64).
MAX_INT64: Final = 2**63 - 1


class RejectReason(enum.Enum):
    """Why a record was not used (the value is the code written to the rejects file)."""

    NOT_MSGPACK = "not_msgpack"
    TRUNCATED = "truncated"
    TOO_LARGE = "too_large"
    BAD_BLOCK = "bad_block"
    NOT_A_MAP = "not_a_map"
    MISSING_FIELD = "missing_field"
    WRONG_TYPE = "wrong_type"
    BAD_VALUE = "bad_value"
    UNKNOWN_KIND = "unknown_kind"
    HALF_TRADE = "half_trade"
    FUTURE = "future"
    BACKDATED = "backdated"
    SYMBOL_LIMIT = "symbol_limit"
    LATE = "late"
    MIXED_BOOK = "mixed_book"
    TOO_MANY_LEVELS = "too_many_levels"


class MalformedTickError(Exception):
    """Raised by :func:`decode_tick` for a malformed record (not a BarsmithError: it is
    data, handled by counting, never an error of the run)."""

    def __init__(self, reason: RejectReason, detail: str) -> None:
        super().__init__(f"{reason.value}: {detail}")
        self.reason = reason
        self.detail = detail


class Tick:
    """One validated message. ``bid_px`` etc. are ``None`` when nil or absent; ``present``
    says which of the four quote keys the message carried."""

    __slots__ = (
        "ask_px",
        "ask_qty",
        "asks",
        "bid_px",
        "bid_qty",
        "bids",
        "is_snapshot",
        "present",
        "seq",
        "sym",
        "trade_px",
        "trade_qty",
        "ts",
    )

    def __init__(
        self,
        sym: str,
        ts: int,
        seq: int,
        is_snapshot: bool,
        present: int = 0,
        bid_px: float | None = None,
        bid_qty: float | None = None,
        ask_px: float | None = None,
        ask_qty: float | None = None,
        trade_px: float | None = None,
        trade_qty: float | None = None,
        bids: list[tuple[float, float]] | None = None,
        asks: list[tuple[float, float]] | None = None,
    ) -> None:
        self.sym = sym
        self.ts = ts
        self.seq = seq
        self.is_snapshot = is_snapshot
        self.present = present
        self.bid_px = bid_px
        self.bid_qty = bid_qty
        self.ask_px = ask_px
        self.ask_qty = ask_qty
        self.trade_px = trade_px
        self.trade_qty = trade_qty
        self.bids = bids  # depth levels (None: the message has no ``bids`` key)
        self.asks = asks

    @property
    def has_levels(self) -> bool:
        return self.bids is not None or self.asks is not None

    def to_wire(self) -> dict[str, Any]:
        """The message as a wire map (for recording, publishing and tests)."""
        out: dict[str, Any] = {
            "sym": self.sym,
            "ts": self.ts,
            "seq": self.seq,
            "kind": "snapshot" if self.is_snapshot else "delta",
        }
        for bit, key, value in (
            (BID_PX, "bid_px", self.bid_px),
            (BID_QTY, "bid_qty", self.bid_qty),
            (ASK_PX, "ask_px", self.ask_px),
            (ASK_QTY, "ask_qty", self.ask_qty),
        ):
            if self.present & bit:
                out[key] = value
        if self.trade_px is not None:
            out["trade_px"] = self.trade_px
            out["trade_qty"] = self.trade_qty
        if self.bids is not None:
            out["bids"] = [[px, qty] for px, qty in self.bids]
        if self.asks is not None:
            out["asks"] = [[px, qty] for px, qty in self.asks]
        return out

    def __repr__(self) -> str:
        return f"Tick({self.to_wire()!r})"


def new_tick(
    sym: str,
    ts: int,
    seq: int,
    is_snapshot: bool,
    present: int,
    bid_px: float | None,
    bid_qty: float | None,
    ask_px: float | None,
    ask_qty: float | None,
    trade_px: float | None,
    trade_qty: float | None,
    bids: list[tuple[float, float]] | None = None,
    asks: list[tuple[float, float]] | None = None,
) -> Tick:
    """``Tick(...)`` with every field given by position: what the record scanner calls.

    Compiled, a function takes its arguments from C as they lie, where calling the class
    packs them into a tuple and parses that against the keywords of ``__init__`` first:
    a tenth of a replay's time went there."""
    return Tick(sym, ts, seq, is_snapshot, present, bid_px, bid_qty, ask_px, ask_qty, trade_px, trade_qty, bids, asks)


_MISSING: Final[Any] = object()
_KIND_SNAPSHOT: Final = "snapshot"
_KIND_DELTA: Final = "delta"


def _number(key: str, value: Any, positive: bool) -> float:
    """A finite int/float (bools are not numbers here), > 0 or >= 0."""
    kind = type(value)
    if kind is float:
        number: float = value
    elif kind is int:
        number = float(value)
    else:
        raise MalformedTickError(RejectReason.WRONG_TYPE, f"{key}: expected a number, got {kind.__name__}")
    if not math.isfinite(number):
        raise MalformedTickError(RejectReason.BAD_VALUE, f"{key}: not finite ({value!r})")
    if number < 0.0 or (positive and number == 0.0):
        limit = "> 0" if positive else ">= 0"
        raise MalformedTickError(RejectReason.BAD_VALUE, f"{key}: must be {limit}, got {value!r}")
    return number


def _integer(key: str, value: Any, minimum: int) -> int:
    if value is _MISSING:
        raise MalformedTickError(RejectReason.MISSING_FIELD, f"{key}: required")
    if type(value) is not int:
        raise MalformedTickError(RejectReason.WRONG_TYPE, f"{key}: expected an integer, got {type(value).__name__}")
    if value < minimum or value > MAX_INT64:
        raise MalformedTickError(RejectReason.BAD_VALUE, f"{key}: out of range ({value})")
    number: int = value
    return number


def _symbol(value: Any) -> str:
    if value is _MISSING:
        raise MalformedTickError(RejectReason.MISSING_FIELD, "sym: required")
    if type(value) is not str:
        raise MalformedTickError(RejectReason.WRONG_TYPE, f"sym: expected a string, got {type(value).__name__}")
    sym: str = value
    if not 0 < len(sym) <= MAX_SYMBOL_CHARS or not sym.isprintable():
        raise MalformedTickError(RejectReason.BAD_VALUE, f"sym: 1-{MAX_SYMBOL_CHARS} printable characters, got {sym!r}")
    return sym


def _quote(rec: dict[str, Any], key: str, positive: bool) -> tuple[bool, float | None]:
    value = rec.get(key, _MISSING)
    if value is _MISSING:
        return False, None
    if value is None:
        return True, None
    return True, _number(key, value, positive)


def _levels(key: str, value: Any, snapshot: bool) -> list[tuple[float, float]] | None:
    """``bids`` / ``asks``: a list of [px, qty] pairs, each price once."""
    if value is _MISSING:
        return None
    if type(value) is not list:
        got = type(value).__name__
        raise MalformedTickError(RejectReason.WRONG_TYPE, f"{key}: expected a list of [px, qty], got {got}")
    items: list[Any] = value
    levels: list[tuple[float, float]] = []
    for i in range(len(items)):
        level = items[i]
        if type(level) is not list or len(level) != 2:
            raise MalformedTickError(RejectReason.WRONG_TYPE, f"{key}[{i}]: expected a [px, qty] pair")
        px = level[0]
        qty = level[1]
        # The usual level (two floats in range) is checked here; anything else by _number,
        # which says what is wrong (messages are only formatted then).
        if type(px) is not float or not 0.0 < px < math.inf:
            px = _number(f"{key}[{i}] px", px, True)
        if type(qty) is not float or not (0.0 < qty < math.inf or (qty == 0.0 and not snapshot)):
            qty = _number(f"{key}[{i}] qty", qty, snapshot)  # a snapshot lists resting levels only
        levels.append((px, qty))
    if len({px for px, _ in levels}) != len(levels):
        seen: set[float] = set()
        for px, _ in levels:
            if px in seen:
                raise MalformedTickError(RejectReason.BAD_VALUE, f"{key}: the price {px!r} is listed twice")
            seen.add(px)
    return levels


def decode_tick(rec: Any) -> Tick:
    """Validate one decoded msgpack object against the wire format.

    Raises :class:`MalformedTickError` with the reason and a one-line detail when the
    record is malformed; never raises anything else. (Records read from files or
    Kafka in the usual shape are decoded by :mod:`barsmith.ingest.fastwire` and do
    not come here; this is the general path, and the definition it must agree with.)
    """
    if type(rec) is not dict:
        raise MalformedTickError(RejectReason.NOT_A_MAP, f"expected a map, got {type(rec).__name__}")
    sym = _symbol(rec.get("sym", _MISSING))
    ts = _integer("ts", rec.get("ts", _MISSING), 1)
    seq = _integer("seq", rec.get("seq", _MISSING), 0)
    kind = rec.get("kind", _MISSING)
    if kind == _KIND_DELTA:
        is_snapshot = False
    elif kind == _KIND_SNAPSHOT:
        is_snapshot = True
    elif kind is _MISSING:
        raise MalformedTickError(RejectReason.MISSING_FIELD, "kind: required")
    elif type(kind) is str:
        raise MalformedTickError(RejectReason.UNKNOWN_KIND, f"kind: {kind!r} is neither 'delta' nor 'snapshot'")
    else:
        raise MalformedTickError(RejectReason.WRONG_TYPE, f"kind: expected a string, got {type(kind).__name__}")

    present = 0
    has, bid_px = _quote(rec, "bid_px", True)
    if has:
        present |= BID_PX
    has, bid_qty = _quote(rec, "bid_qty", False)
    if has:
        present |= BID_QTY
    has, ask_px = _quote(rec, "ask_px", True)
    if has:
        present |= ASK_PX
    has, ask_qty = _quote(rec, "ask_qty", False)
    if has:
        present |= ASK_QTY

    raw_px = rec.get("trade_px")
    raw_qty = rec.get("trade_qty")
    trade_px: float | None = None
    trade_qty: float | None = None
    if raw_px is not None or raw_qty is not None:
        if raw_px is None or raw_qty is None:
            missing = "trade_qty" if raw_qty is None else "trade_px"
            raise MalformedTickError(
                RejectReason.HALF_TRADE, f"a trade needs both trade_px and trade_qty; {missing} is missing"
            )
        trade_px = _number("trade_px", raw_px, True)
        trade_qty = _number("trade_qty", raw_qty, True)
    bids = _levels("bids", rec.get("bids", _MISSING), is_snapshot)
    asks = _levels("asks", rec.get("asks", _MISSING), is_snapshot)
    if (bids is not None or asks is not None) and present:
        fields = ", ".join(k for k in ("bid_px", "bid_qty", "ask_px", "ask_qty") if k in rec)
        raise MalformedTickError(
            RejectReason.MIXED_BOOK, f"depth levels together with top-of-book fields ({fields}): one form per book"
        )
    return Tick(sym, ts, seq, is_snapshot, present, bid_px, bid_qty, ask_px, ask_qty, trade_px, trade_qty, bids, asks)
