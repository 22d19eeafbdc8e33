"""One side of a depth book: price levels with their resting quantity.

The levels form a skip list kept best first (bids: the highest price first; asks: the
lowest), with a price → level map beside it:

- changing the quantity of a level that exists is one map look-up, O(1);
- adding or removing a level walks the list's towers, O(log levels) expected -- never a
  shift of the levels behind it, never a re-sort. A level's tower height is drawn from the
  ladder's own random generator, not from its price, so no feed can choose prices that make
  the walk long;
- the best level is the first, and the best N are the first N: reading them costs O(N),
  whatever the side's size.
"""

from __future__ import annotations

from typing import Any

# Towers grow a floor with probability 1/4, up to 16 floors: the expected walk stays
# logarithmic up to 4**16 levels a side, far beyond any level limit.
MAX_HEIGHT = 16
_MASK32 = 0xFFFFFFFF


class _Level:
    """A price level and its links, one per floor of its tower."""

    __slots__ = ("key", "links", "px", "qty")

    def __init__(self, key: float, px: float, qty: float, height: int) -> None:
        self.key = key  # the list is ascending in key: px for asks, -px for bids, so best first
        self.px = px
        self.qty = qty
        self.links: list[_Level | None] = [None] * height


class Ladder:
    """The levels of one side. ``descending``: the best price is the highest (bids)."""

    __slots__ = ("_floors", "_head", "_levels", "_rng", "descending")

    def __init__(self, descending: bool) -> None:
        self.descending = descending
        self._head = _Level(0.0, 0.0, 0.0, MAX_HEIGHT)  # links to the first level of each floor
        self._floors = 1  # floors in use
        self._levels: dict[float, _Level] = {}
        self._rng = 0x2545F491  # xorshift32 state; any non-zero seed

    def __len__(self) -> int:
        return len(self._levels)

    def set(self, px: float, qty: float) -> None:
        """The level at ``px`` now rests ``qty`` (0 removes it)."""
        level = self._levels.get(px)
        if qty > 0.0:
            if level is not None:
                level.qty = qty
            else:
                self._insert(px, qty)
        elif level is not None:
            self._remove(level)

    def replace(self, levels: list[tuple[float, float]]) -> None:
        """The whole side (a snapshot's levels, quantities > 0)."""
        head = self._head
        for floor in range(MAX_HEIGHT):
            head.links[floor] = None
        self._levels = {}
        self._floors = 1
        descending = self.descending
        ordered = sorted(levels, reverse=descending)
        last: list[_Level] = [head] * MAX_HEIGHT  # the last level of each floor so far
        for px, qty in ordered:
            height = self._draw_height()
            if height > self._floors:
                self._floors = height
            level = _Level(-px if descending else px, px, qty, height)
            for floor in range(height):
                last[floor].links[floor] = level
                last[floor] = level
            self._levels[px] = level

    def size_after(self, levels: list[tuple[float, float]]) -> int:
        """How many levels the side would have after the delta ``levels``."""
        size = len(self._levels)
        book = self._levels
        for px, qty in levels:
            if px in book:
                size -= qty == 0.0
            else:
                size += qty > 0.0
        return size

    def best(self) -> float | None:
        first = self._head.links[0]
        return None if first is None else first.px

    def best_qty(self) -> float | None:
        first = self._head.links[0]
        return None if first is None else first.qty

    def top_qty(self, n: int) -> float:
        """Σ qty of the best ``n`` levels."""
        total = 0.0
        level = self._head.links[0]
        while level is not None and n > 0:
            total += level.qty
            level = level.links[0]
            n -= 1
        return total

    def levels(self) -> list[tuple[float, float]]:
        """Every level as ``(px, qty)``, in ascending price order."""
        out: list[tuple[float, float]] = []
        level = self._head.links[0]
        while level is not None:
            out.append((level.px, level.qty))
            level = level.links[0]
        if self.descending:
            out.reverse()
        return out

    def search_steps(self, px: float) -> int:
        """How many links a walk to ``px`` follows (the cost of adding or removing it)."""
        before: list[_Level] = [self._head] * MAX_HEIGHT
        return self._walk(-px if self.descending else px, before)

    def to_state(self) -> list[Any]:
        return [[px, qty] for px, qty in self.levels()]

    def restore(self, data: list[Any]) -> None:
        self.replace([(float(px), float(qty)) for px, qty in data])

    def _walk(self, key: float, before: list[_Level]) -> int:
        """Fill ``before[floor]`` with the last level of each floor whose key is below
        ``key``; returns the number of links followed."""
        steps = 0
        level = self._head
        for floor in range(self._floors - 1, -1, -1):
            ahead = level.links[floor]
            while ahead is not None and ahead.key < key:
                level = ahead
                ahead = level.links[floor]
                steps += 1
            before[floor] = level
            steps += 1
        return steps

    def _insert(self, px: float, qty: float) -> None:
        key = -px if self.descending else px
        head = self._head
        before: list[_Level] = [head] * MAX_HEIGHT
        self._walk(key, before)
        height = self._draw_height()
        if height > self._floors:
            self._floors = height  # the new floors start at the head: before[] holds it already
        level = _Level(key, px, qty, height)
        for floor in range(height):
            previous = before[floor]
            level.links[floor] = previous.links[floor]
            previous.links[floor] = level
        self._levels[px] = level

    def _remove(self, level: _Level) -> None:
        head = self._head
        before: list[_Level] = [head] * MAX_HEIGHT
        self._walk(level.key, before)
        for floor in range(len(level.links)):
            previous = before[floor]
            if previous.links[floor] is level:
                previous.links[floor] = level.links[floor]
        del self._levels[level.px]
        while self._floors > 1 and head.links[self._floors - 1] is None:
            self._floors -= 1

    def _draw_height(self) -> int:
        """1 floor, plus one more with probability 1/4 each (xorshift32 bits)."""
        x = self._rng
        x ^= (x << 13) & _MASK32
        x ^= x >> 17
        x ^= (x << 5) & _MASK32
        self._rng = x
        height = 1
        while height < MAX_HEIGHT and x & 3 == 0:
            height += 1
            x >>= 2
        return height
