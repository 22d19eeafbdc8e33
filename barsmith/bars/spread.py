"""The ``spread`` statistic group: the book a bar closed with, and its spread over time.

The spread is ask - bid when the book is live and both prices are set, else undefined.
Its statistics are time-weighted: the spread in effect at each instant of the bar's
window, weighted by how long it held; undefined periods and zero-length states are
left out; min/max are over states that held for a positive time. A time bar's window
is its interval [start, end), including the state carried in from before ``start``;
an event bar's is [first trade, closing trade), and when that has zero length, the
statistics are the spread in effect at its first trade. A bar emitted incomplete
because input ended integrates up to the last event time seen.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from barsmith.bars.columns import Column
from barsmith.bars.group import Accumulator, StatGroup, Tracker, register_group
from barsmith.book.book import SymbolBook

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

COLUMNS = (
    Column("bid_close", "float64", True, "best bid after the bar's last accepted message (null: not live, side empty)"),
    Column("ask_close", "float64", True, "best ask after the bar's last accepted message (null: not live, side empty)"),
    Column("spread_close", "float64", True, "ask_close - bid_close (null when either is)"),
    Column("spread_mean", "float64", True, "time-weighted mean spread over the bar's window", show=True),
    Column("spread_min", "float64", True, "smallest spread that held for a positive time in the window"),
    Column("spread_max", "float64", True, "largest spread that held for a positive time in the window"),
)


class SpreadTracker(Tracker):
    def __init__(self) -> None:
        super().__init__("spread")

    def value(self, book: SymbolBook) -> float | None:
        return book.spread()


class SpreadAccumulator(Accumulator):
    """Time-weighted spread and the closing book of one bar."""

    __slots__ = ("area", "ask", "bid", "high", "low", "opening", "span", "spread_close")

    def __init__(self) -> None:
        self.area = 0.0
        self.span = 0  # ns of defined spread in the window
        self.low = 0.0
        self.high = 0.0
        self.opening: float | None = None  # the spread in effect when the bar opened
        self.bid: float | None = None
        self.ask: float | None = None
        self.spread_close: float | None = None

    def opened(self, slot: int, value: float | None) -> None:
        self.opening = value

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        if value is None:
            return
        begin = since if since > start else start
        held = until - begin
        if held <= 0:
            return
        if self.span == 0:
            self.low = self.high = value
        elif value < self.low:
            self.low = value
        elif value > self.high:
            self.high = value
        self.area += value * held
        self.span += held

    def closing(self, book: SymbolBook) -> None:
        self.bid, self.ask, self.spread_close = book.snapshot_state()

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        row.append(self.bid)
        row.append(self.ask)
        row.append(self.spread_close)
        if self.span > 0:
            row.extend((self.area / self.span, self.low, self.high))
        elif empty_window:
            row.extend((self.opening, self.opening, self.opening))
        else:
            row.extend((None, None, None))

    def to_state(self) -> list[Any]:
        return [self.area, self.span, self.low, self.high, self.opening, self.bid, self.ask, self.spread_close]

    def restore(self, data: list[Any]) -> None:
        self.area, self.span, self.low, self.high = data[0], int(data[1]), data[2], data[3]
        self.opening, self.bid, self.ask, self.spread_close = data[4], data[5], data[6], data[7]


class SpreadGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__(
            "spread",
            "the closing book, and the time-weighted spread",
            COLUMNS,
            trackers=(SpreadTracker(),),
            on_closing_book=True,
        )

    def accumulator(self) -> Accumulator:
        return SpreadAccumulator()


SPREAD = register_group(SpreadGroup())
