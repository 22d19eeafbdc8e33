"""Per-symbol top-of-book with an explicit live / resyncing state machine.

Rules (the README's "Book rules" table; tests pin every line):

* A **snapshot** is always applied: it sets all four quote fields (absent = that side
  empty), makes the book ``LIVE`` and sets the last sequence number to its own.
* A **delta** is judged by ``seq`` against the last accepted ``last``:
  first message ever → accepted, ``RESYNCING``; ``seq <= last`` → duplicate, dropped;
  ``seq == last + 1`` → accepted, quotes applied if live; ``seq > last + 1`` → a gap:
  accepted, counted, ``RESYNCING`` until the next snapshot.
* Event time per symbol never goes backwards: a ``ts`` below the last accepted one is
  raised to it (a counted *time regression*); one too far below it is refused.
* Trades are signed (:meth:`SymbolBook.sign_trade`, only when a bar set asks for signs)
  by the Lee--Ready rule against the quote prevailing before the message: above the
  midpoint a buy, below it a sell, at it the tick test; with no valid quote (not live,
  a side unset, or crossed) the tick test alone. The tick test compares with the last
  trade price the book saw that differs from this one: up → buy, down → sell, and a
  trade at the last price takes the direction of the last change (zero-up → buy,
  zero-down → sell); with no earlier different price it is unsigned (0). The last
  trade price and the last change's direction outlive bars, and checkpoints keep them.

* A **depth** symbol (its messages carry ``bids`` / ``asks`` levels) keeps a
  :class:`~barsmith.book.depth.Ladder` per side under the same sequence and status
  rules: a snapshot replaces both sides (absent = empty), a live delta sets each level
  it lists (qty 0 removes it); the top-of-book fields are then the best levels. A
  symbol is kept one way: once it has levels, top-of-book fields are refused for it,
  and levels are refused while it has top-of-book quotes (``mixed_book``, see
  :meth:`SymbolBook.depth_problem`); so is a message that would leave a side with more
  levels than the limit (``too_many_levels``). Crossed and locked books are kept as
  they come (statistics say what they make of them).

Transitions::

    (new) --snapshot--> LIVE        (new) --delta--> RESYNCING
    LIVE --gap--> RESYNCING         RESYNCING --snapshot--> LIVE
"""

from __future__ import annotations

import enum
from typing import Any, Final

from barsmith.book.depth import Ladder
from barsmith.ingest.ticks import ASK_PX, ASK_QTY, BID_PX, BID_QTY, Tick


class BookStatus(enum.Enum):
    """Whether a book's quotes can be trusted."""

    LIVE = "live"
    RESYNCING = "resyncing"


class Outcome(enum.Enum):
    """What happened to one message at the book."""

    ACCEPTED = "accepted"
    GAP = "gap"  # accepted, after a sequence gap
    DUPLICATE = "duplicate"  # dropped: seq at or below the last accepted
    BACKDATED = "backdated"  # rejected: ts implausibly far behind the symbol's last ts


_LIVE: Final = BookStatus.LIVE
_RESYNCING: Final = BookStatus.RESYNCING
_GAP: Final = Outcome.GAP
NO_LIMIT_NS: Final = 2**62  # no plausibility limit on how far behind a message may be


class SymbolBook:
    """Top of book for one symbol: :meth:`admit` judges a message by the sequence rules,
    :meth:`apply` makes its effect on the book."""

    __slots__ = (
        "ask_px",
        "ask_qty",
        "asks",
        "bid_px",
        "bid_qty",
        "bids",
        "depth",
        "last_seq",
        "last_trade_px",
        "last_ts",
        "status",
        "symbol",
        "tick_dir",
        "time_regressions",
    )

    def __init__(self, symbol: str) -> None:
        self.symbol = symbol
        self.status = _RESYNCING
        self.last_seq = -1  # -1: no message accepted yet
        self.last_ts = 0
        self.bid_px: float | None = None
        self.bid_qty: float | None = None
        self.ask_px: float | None = None
        self.ask_qty: float | None = None
        self.time_regressions = 0
        self.last_trade_px: float | None = None  # the last trade seen by sign_trade
        self.tick_dir = 0  # direction of the last trade price change: +1 up, -1 down, 0 none yet
        self.depth = False  # the symbol's book is kept by levels (its first levels made it so)
        self.bids = Ladder(True)
        self.asks = Ladder(False)

    @property
    def is_live(self) -> bool:
        return self.status is _LIVE

    def spread(self) -> float | None:
        """ask - bid when the book is live and both prices are set, else ``None``."""
        if self.status is _LIVE and self.bid_px is not None and self.ask_px is not None:
            return self.ask_px - self.bid_px
        return None

    def mid(self) -> float | None:
        """(bid + ask) / 2 of a valid quote: live, both prices set, not crossed."""
        if self.status is _LIVE:
            bid = self.bid_px
            ask = self.ask_px
            if bid is not None and ask is not None and bid <= ask:
                return (bid + ask) * 0.5
        return None

    def sign_trade(self, px: float) -> int:
        """The Lee--Ready direction of a trade at ``px`` against the quote as it stands
        (call it before the trade's message changes the book): +1 buy, -1 sell, 0 not
        signable. Updates the tick-test state, so call it once per trade, in order."""
        last = self.last_trade_px
        if last is not None and px != last:
            self.tick_dir = 1 if px > last else -1
        self.last_trade_px = px
        mid = self.mid()
        if mid is not None:
            if px > mid:
                return 1
            if px < mid:
                return -1
        return self.tick_dir  # the tick test: this trade's move, or the last move for a zero tick

    def depth_problem(self, tick: Tick, max_levels: int) -> tuple[bool, str] | None:
        """Why the book refuses this message (before :meth:`admit`): ``(too_many, detail)``
        -- ``too_many`` for a side beyond ``max_levels``, else a mix of book forms -- or
        None. Call it for messages with levels and for every message of a depth book."""
        if not tick.has_levels:
            if tick.present:
                return False, "top-of-book fields for a symbol kept by depth levels"
            return None
        if not self.depth and (self.bid_px is not None or self.ask_px is not None):
            return False, "depth levels for a symbol kept by top-of-book fields"
        for name, levels, ladder in (("bids", tick.bids, self.bids), ("asks", tick.asks, self.asks)):
            if levels is None:
                continue
            size = len(levels) if tick.is_snapshot or not self.depth else ladder.size_after(levels)
            if size > max_levels:
                return True, f"{name}: {size} levels, more than limits.max_depth_levels ({max_levels})"
        return None

    def admit(self, tick: Tick, max_behind_ns: int = NO_LIMIT_NS) -> Outcome:
        """Judge a message: the sequence rules, then the event-time clamp. Updates only
        ``last_seq``/``last_ts`` (and may raise ``tick.ts``); the book's status and
        quotes are untouched until :meth:`apply`. A message more than ``max_behind_ns``
        behind the symbol's last ``ts`` is not clamped but refused (``BACKDATED``): it
        would land in the current bar with a time it does not have.

        The split matters: between the two, the engine closes the bars that end before
        this message, and those must take the book as it stood after *their* last
        message -- a gap or a snapshot that opens the next interval is not theirs."""
        seq = tick.seq
        last = self.last_seq
        if tick.is_snapshot or last < 0 or seq == last + 1:
            outcome = Outcome.ACCEPTED
        elif seq <= last:
            return Outcome.DUPLICATE
        else:
            outcome = Outcome.GAP
        if tick.ts < self.last_ts - max_behind_ns:
            return Outcome.BACKDATED
        self.last_seq = seq
        if tick.ts < self.last_ts:
            tick.ts = self.last_ts
            self.time_regressions += 1
        else:
            self.last_ts = tick.ts
        return outcome

    def apply(self, tick: Tick, outcome: Outcome) -> None:
        """The admitted message's effect on the book: the status transition (a snapshot
        makes it live, a gap resyncing) and its quote fields under the book rules. A
        message's trade happens before this (trade before quotes)."""
        if tick.bids is not None or tick.asks is not None or self.depth:
            self._apply_levels(tick, outcome)
            return
        if tick.is_snapshot:
            self.status = _LIVE
            self.bid_px = tick.bid_px
            self.bid_qty = tick.bid_qty
            self.ask_px = tick.ask_px
            self.ask_qty = tick.ask_qty
            return
        if outcome is _GAP:
            self.status = _RESYNCING
            return
        if self.status is not _LIVE:
            return  # resyncing: the quote state is unknown until the next snapshot
        present = tick.present
        if present:
            if present & BID_PX:
                self.bid_px = tick.bid_px
            if present & BID_QTY:
                self.bid_qty = tick.bid_qty
            if present & ASK_PX:
                self.ask_px = tick.ask_px
            if present & ASK_QTY:
                self.ask_qty = tick.ask_qty

    def _apply_levels(self, tick: Tick, outcome: Outcome) -> None:
        """:meth:`apply` for a depth book; then the best levels are the top of book."""
        self.depth = True
        bids, asks = tick.bids, tick.asks
        if tick.is_snapshot:
            self.status = _LIVE
            self.bids.replace(bids if bids is not None else [])
            self.asks.replace(asks if asks is not None else [])
        elif outcome is _GAP:
            self.status = _RESYNCING
            return
        elif self.status is not _LIVE:
            return
        else:
            if bids is not None:
                for px, qty in bids:
                    self.bids.set(px, qty)
            if asks is not None:
                for px, qty in asks:
                    self.asks.set(px, qty)
        self.bid_px = self.bids.best()
        self.bid_qty = self.bids.best_qty()
        self.ask_px = self.asks.best()
        self.ask_qty = self.asks.best_qty()

    def depth_qty(self, levels: int) -> tuple[float | None, float | None]:
        """Resting quantity on each side: the best ``levels`` levels of a depth book, the
        best level's of a top-of-book one; None where the book is not live or the side
        has no price."""
        if self.status is not _LIVE:
            return None, None
        if self.depth:
            bid = self.bids.top_qty(levels) if self.bid_px is not None else None
            ask = self.asks.top_qty(levels) if self.ask_px is not None else None
            return bid, ask
        return (self.bid_qty if self.bid_px is not None else None), (self.ask_qty if self.ask_px is not None else None)

    def snapshot_state(self) -> tuple[float | None, float | None, float | None]:
        """(bid, ask, spread) as published with a bar: ``None`` unless live and set."""
        if self.status is not _LIVE:
            return None, None, None
        bid = self.bid_px
        ask = self.ask_px
        spread = ask - bid if bid is not None and ask is not None else None
        return bid, ask, spread

    def to_state(self) -> list[Any]:
        """The book as plain data (for checkpoints)."""
        return [
            self.status.value,
            self.last_seq,
            self.last_ts,
            self.bid_px,
            self.bid_qty,
            self.ask_px,
            self.ask_qty,
            self.time_regressions,
            self.last_trade_px,
            self.tick_dir,
            [self.bids.to_state(), self.asks.to_state()] if self.depth else None,
        ]

    def restore(self, data: list[Any]) -> None:
        """Inverse of :meth:`to_state`."""
        self.status = BookStatus(data[0])
        self.last_seq, self.last_ts = int(data[1]), int(data[2])
        self.bid_px, self.bid_qty, self.ask_px, self.ask_qty = data[3], data[4], data[5], data[6]
        self.time_regressions = int(data[7])
        if len(data) > 8:  # checkpoint format 3 on
            self.last_trade_px, self.tick_dir = data[8], int(data[9])
            if data[10] is not None:
                self.depth = True
                self.bids.restore(data[10][0])
                self.asks.restore(data[10][1])
