"""The bar record every sink writes, and the accumulator that builds one.

Spread statistics are time-weighted: the spread in effect at each instant of the
bar's window, weighted by how long it held. Undefined periods (book resyncing, a
side empty) and zero-length states are left out. A time bar's window is its
interval [start, end), including the state carried in from before ``start``. An
event bar's window is [first trade, closing trade); when that window has zero
length, the statistics are the spread in effect at its first trade. A bar emitted
incomplete because input ended integrates up to the last event time seen.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Final


@dataclass(slots=True)
class Bar:
    """One finished bar, with exactly the output columns (timestamps in ns since the epoch, UTC)."""

    symbol: str
    spec: str
    start: int
    end: int
    open: float | None
    high: float | None
    low: float | None
    close: float | None
    volume: float
    notional: float
    vwap: float | None
    trades: int
    messages: int
    gaps: int
    bid_close: float | None
    ask_close: float | None
    spread_close: float | None
    spread_mean: float | None
    spread_min: float | None
    spread_max: float | None
    complete: bool

    def as_dict(self) -> dict[str, Any]:
        """The bar as a plain map in column order (for the bus sink and tests)."""
        # Spelled out, not getattr() over BAR_COLUMNS: compiled, these are direct field
        # reads (a test pins the keys to BAR_COLUMNS).
        return {
            "symbol": self.symbol,
            "spec": self.spec,
            "start": self.start,
            "end": self.end,
            "open": self.open,
            "high": self.high,
            "low": self.low,
            "close": self.close,
            "volume": self.volume,
            "notional": self.notional,
            "vwap": self.vwap,
            "trades": self.trades,
            "messages": self.messages,
            "gaps": self.gaps,
            "bid_close": self.bid_close,
            "ask_close": self.ask_close,
            "spread_close": self.spread_close,
            "spread_mean": self.spread_mean,
            "spread_min": self.spread_min,
            "spread_max": self.spread_max,
            "complete": self.complete,
        }


BAR_COLUMNS: Final[tuple[str, ...]] = tuple(f.name for f in fields(Bar))


class OpenBar:
    """A bar being built. Hot path: plain attributes, no properties."""

    __slots__ = (
        "close",
        "closed_book",
        "end",
        "gaps",
        "high",
        "low",
        "messages",
        "notional",
        "open",
        "open_spread",
        "spec_text",
        "spread_area",
        "spread_max",
        "spread_min",
        "spread_time",
        "start",
        "symbol",
        "trades",
        "volume",
    )

    def __init__(self, spec_text: str, symbol: str, start: int, end: int) -> None:
        self.spec_text = spec_text
        self.symbol = symbol
        self.start = start
        self.end = end
        self.open = 0.0
        self.high = 0.0
        self.low = 0.0
        self.close = 0.0
        self.volume = 0.0
        self.notional = 0.0
        self.trades = 0
        self.messages = 0
        self.gaps = 0
        self.spread_area = 0.0
        self.spread_time = 0
        self.spread_min = 0.0
        self.spread_max = 0.0
        # Event bars: the spread when the bar opened, for a zero-length window.
        self.open_spread: float | None = None
        # (bid, ask, spread) frozen when a time bar is sealed before it is emitted.
        self.closed_book: tuple[float | None, float | None, float | None] | None = None

    def add_trade(self, px: float, qty: float) -> None:
        if self.trades == 0:
            self.open = self.high = self.low = px
        elif px > self.high:
            self.high = px
        elif px < self.low:
            self.low = px
        self.close = px
        self.volume += qty
        self.notional += px * qty
        self.trades += 1

    def integrate(self, spread: float | None, since: int, until: int) -> None:
        """Add the spread ``spread`` holding over [since, until), clipped to the bar's start."""
        if spread is None:
            return
        begin = since if since > self.start else self.start
        held = until - begin
        if held <= 0:
            return
        if self.spread_time == 0:
            self.spread_min = self.spread_max = spread
        elif spread < self.spread_min:
            self.spread_min = spread
        elif spread > self.spread_max:
            self.spread_max = spread
        self.spread_area += spread * held
        self.spread_time += held

    def finish(
        self, book_state: tuple[float | None, float | None, float | None], complete: bool, empty_window: bool
    ) -> Bar:
        """The output record, with the book state after the bar's last message.
        ``empty_window``: an event bar whose spread window has zero length; its spread
        statistics are then the spread in effect at its first trade."""
        bid, ask, spread_close = book_state
        traded = self.trades > 0
        if self.spread_time > 0:
            mean: float | None = self.spread_area / self.spread_time
            low: float | None = self.spread_min
            high: float | None = self.spread_max
        elif empty_window:
            mean = low = high = self.open_spread
        else:
            mean = low = high = None
        return Bar(
            symbol=self.symbol,
            spec=self.spec_text,
            start=self.start,
            end=self.end,
            open=self.open if traded else None,
            high=self.high if traded else None,
            low=self.low if traded else None,
            close=self.close if traded else None,
            volume=self.volume,
            notional=self.notional,
            vwap=self.notional / self.volume if self.volume > 0.0 else None,
            trades=self.trades,
            messages=self.messages,
            gaps=self.gaps,
            bid_close=bid,
            ask_close=ask,
            spread_close=spread_close,
            spread_mean=mean,
            spread_min=low,
            spread_max=high,
            complete=complete,
        )
