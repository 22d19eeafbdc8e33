"""The ``signed`` statistic group: who initiated the bar's volume.

Each trade is signed by the Lee--Ready rule against the quote prevailing before its
message (:meth:`barsmith.book.book.SymbolBook.sign_trade`): a buy (+1) lifts the
offer side, a sell (-1) hits the bid; a trade that neither the quote rule nor the
tick test can sign (no valid quote and no earlier different trade price) is
*unsigned*. ``buy_volume + sell_volume + unsigned_volume`` is the bar's ``volume``
(summed in message order).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from barsmith.bars.columns import Column
from barsmith.bars.group import Accumulator, StatGroup, register_group
from barsmith.book.book import SymbolBook

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

COLUMNS = (
    Column("buy_volume", "float64", False, "Σ qty of trades signed buy (Lee-Ready against the prevailing quote)"),
    Column("sell_volume", "float64", False, "Σ qty of trades signed sell (Lee-Ready against the prevailing quote)"),
    Column(
        "unsigned_volume", "float64", False, "Σ qty of trades no rule could sign (no valid quote nor earlier price)"
    ),
    Column("buy_trades", "int64", False, "trades signed buy"),
    Column("sell_trades", "int64", False, "trades signed sell"),
)


class SignedAccumulator(Accumulator):
    """Buy, sell and unsigned volume and trade counts of one bar."""

    __slots__ = ("buy_trades", "buy_volume", "sell_trades", "sell_volume", "unsigned_volume")

    def __init__(self) -> None:
        self.buy_volume = 0.0
        self.sell_volume = 0.0
        self.unsigned_volume = 0.0
        self.buy_trades = 0
        self.sell_trades = 0

    def trade(self, px: float, qty: float, sign: int, book: SymbolBook) -> None:
        if sign > 0:
            self.buy_volume += qty
            self.buy_trades += 1
        elif sign < 0:
            self.sell_volume += qty
            self.sell_trades += 1
        else:
            self.unsigned_volume += qty

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        row.extend((self.buy_volume, self.sell_volume, self.unsigned_volume, self.buy_trades, self.sell_trades))

    def to_state(self) -> list[Any]:
        return [self.buy_volume, self.sell_volume, self.unsigned_volume, self.buy_trades, self.sell_trades]

    def restore(self, data: list[Any]) -> None:
        self.buy_volume, self.sell_volume, self.unsigned_volume = data[0], data[1], data[2]
        self.buy_trades, self.sell_trades = int(data[3]), int(data[4])


class SignedGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__("signed", "buy, sell and unsigned volume and trades (Lee-Ready)", COLUMNS, signs=True)

    def accumulator(self) -> Accumulator:
        return SignedAccumulator()


SIGNED = register_group(SignedGroup())
