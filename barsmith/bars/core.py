"""The ``core`` statistic group: what a bar's trades add up to.

Open, high, low and close are trade prices; volume is Σ qty and notional Σ px·qty
(summed in message order); VWAP = notional / volume. ``messages`` and ``gaps`` count
the bar's accepted messages and the sequence gaps among them -- the engine counts
those in the bar's frame, and this group publishes them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from barsmith.bars.columns import Column
from barsmith.bars.group import Accumulator, StatGroup, register_group
from barsmith.book.book import SymbolBook

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

COLUMNS = (
    Column("open", "float64", True, "first trade price (null when the bar has no trade)", show=True),
    Column("high", "float64", True, "highest trade price (null when the bar has no trade)", show=True),
    Column("low", "float64", True, "lowest trade price (null when the bar has no trade)", show=True),
    Column("close", "float64", True, "last trade price (null when the bar has no trade)", show=True),
    Column("volume", "float64", False, "Σ qty of the bar's trades", show=True),
    Column("notional", "float64", False, "Σ px·qty of the bar's trades"),
    Column("vwap", "float64", True, "notional / volume (null if no volume)", show=True),
    Column("trades", "int64", False, "trades in the bar", show=True),
    Column("messages", "int64", False, "accepted messages in the bar"),
    Column("gaps", "int64", False, "sequence gaps detected among the bar's messages"),
)


class CoreAccumulator(Accumulator):
    """OHLC, volume, notional and trade count of one bar. Hot path: plain attributes."""

    __slots__ = ("close", "high", "low", "notional", "open", "trades", "volume")

    def __init__(self) -> None:
        self.open = 0.0
        self.high = 0.0
        self.low = 0.0
        self.close = 0.0
        self.volume = 0.0
        self.notional = 0.0
        self.trades = 0

    def trade(self, px: float, qty: float, sign: int, book: SymbolBook) -> None:
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

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        if self.trades > 0:
            row.extend((self.open, self.high, self.low, self.close))
        else:
            row.extend((None, None, None, None))
        row.append(self.volume)
        row.append(self.notional)
        row.append(self.notional / self.volume if self.volume > 0.0 else None)
        row.append(self.trades)
        row.append(bar.messages)
        row.append(bar.gaps)

    def to_state(self) -> list[Any]:
        return [self.open, self.high, self.low, self.close, self.volume, self.notional, self.trades]

    def restore(self, data: list[Any]) -> None:
        self.open, self.high, self.low, self.close = data[0], data[1], data[2], data[3]
        self.volume, self.notional, self.trades = data[4], data[5], int(data[6])


class CoreGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__("core", "OHLC, volume, notional, VWAP, trades, messages, gaps", COLUMNS, on_trade=True)

    def accumulator(self) -> Accumulator:
        return CoreAccumulator()


CORE = register_group(CoreGroup())
