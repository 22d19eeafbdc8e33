"""One side of a depth book: price levels with their resting quantity.

Prices are kept in a sorted list beside a price → quantity map. Changing the quantity
of a level that exists is a map update; adding or removing a level is a binary search
(O(log levels)) and one shift of the price list (a memmove of the levels behind it,
never a re-sort); the best level and the best N are read off the end of the list.
"""

from __future__ import annotations

from bisect import bisect_left, insort
from typing import Any


class Ladder:
    """The levels of one side. ``descending``: the best price is the highest (bids)."""

    __slots__ = ("descending", "prices", "qty")

    def __init__(self, descending: bool) -> None:
        self.descending = descending
        self.prices: list[float] = []  # ascending
        self.qty: dict[float, float] = {}

    def __len__(self) -> int:
        return len(self.prices)

    def set(self, px: float, qty: float) -> None:
        """The level at ``px`` now rests ``qty`` (0 removes it)."""
        levels = self.qty
        if qty > 0.0:
            if px not in levels:
                insort(self.prices, px)
            levels[px] = qty
        elif px in levels:
            del levels[px]
            prices = self.prices
            del prices[bisect_left(prices, px)]

    def replace(self, levels: list[tuple[float, float]]) -> None:
        """The whole side (a snapshot's levels, quantities > 0)."""
        self.qty = dict(levels)
        self.prices = sorted(self.qty)

    def size_after(self, levels: list[tuple[float, float]]) -> int:
        """How many levels the side would have after the delta ``levels``."""
        size = len(self.prices)
        book = self.qty
        for px, qty in levels:
            if px in book:
                size -= qty == 0.0
            else:
                size += qty > 0.0
        return size

    def best(self) -> float | None:
        prices = self.prices
        if not prices:
            return None
        return prices[-1] if self.descending else prices[0]

    def best_qty(self) -> float | None:
        best = self.best()
        return None if best is None else self.qty[best]

    def top_qty(self, n: int) -> float:
        """Σ qty of the best ``n`` levels."""
        prices = self.prices
        chosen = prices[-n:] if self.descending else prices[:n]
        levels = self.qty
        return sum(levels[px] for px in chosen)

    def to_state(self) -> list[Any]:
        return [[px, self.qty[px]] for px in self.prices]

    def restore(self, data: list[Any]) -> None:
        self.replace([(float(px), float(qty)) for px, qty in data])
