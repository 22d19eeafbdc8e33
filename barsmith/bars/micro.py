"""Microstructure statistic groups: the mid, trading costs, resting depth, order flow and
realized variance. Each is a group a bar set names (``@mid,cost``; ``@all``).

* ``mid`` -- ``mid_open/high/low/close`` and ``microprice_close``;
* ``cost`` -- ``rel_spread_bps_mean`` (time-weighted), ``effective_spread`` and
  ``effective_spread_bps`` (volume-weighted over the bar's trades);
* ``depth`` -- ``bid_qty_mean``, ``ask_qty_mean``, ``depth_imbalance_mean`` (time-weighted;
  for depth books over the best ``statistics.depth_levels`` levels);
* ``flow`` -- ``ofi``, the order-flow imbalance of Cont, Kukanov & Stoikov (2014);
* ``crossing`` -- ``crossed_messages``, ``locked_messages``;
* ``rv`` -- ``realized_var``, sampled every ``statistics.rv_sample_ms``.

The *mid* is (bid + ask) / 2 of a valid quote: the book live, both prices set and
bid <= ask (a crossed book has no mid). Time-weighted statistics follow the spread's
rules (:mod:`barsmith.bars.spread`): each value weighted by how long it held inside
the bar's window, undefined periods and zero-length states left out; an event bar
whose window has zero length takes the value in effect at its first trade. Every
column is null where it is undefined (no valid quote in the window, no trade with a
prevailing mid, ...).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from barsmith.bars.columns import Column
from barsmith.bars.group import Accumulator, StatGroup, StatOptions, Tracker, register_group
from barsmith.book.book import SymbolBook
from barsmith.units import format_duration_ns

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar


def microprice(book: SymbolBook) -> float | None:
    """(bid·ask_qty + ask·bid_qty) / (bid_qty + ask_qty) of a valid quote with sizes."""
    if book.mid() is None:
        return None
    bid, ask, bid_qty, ask_qty = book.bid_px, book.ask_px, book.bid_qty, book.ask_qty
    if bid is None or ask is None or bid_qty is None or ask_qty is None or bid_qty + ask_qty <= 0.0:
        return None
    return (bid * ask_qty + ask * bid_qty) / (bid_qty + ask_qty)


# -- trackers: quantities of the book weighted by time -----------------------------------


class MidTracker(Tracker):
    def __init__(self) -> None:
        super().__init__("mid")

    def value(self, book: SymbolBook) -> float | None:
        return book.mid()


class RelSpreadTracker(Tracker):
    """10,000 · (ask - bid) / mid, of a valid quote with a positive mid."""

    def __init__(self) -> None:
        super().__init__("rel_spread_bps")

    def value(self, book: SymbolBook) -> float | None:
        mid = book.mid()
        if mid is None or mid <= 0.0:
            return None
        bid, ask = book.bid_px, book.ask_px
        assert bid is not None and ask is not None
        return 10_000.0 * (ask - bid) / mid


class BidQtyTracker(Tracker):
    """Resting size on the bid: the best level's, or the best ``levels`` of a depth book."""

    def __init__(self, levels: int) -> None:
        super().__init__(f"bid_qty({levels})")
        self.levels = levels

    def value(self, book: SymbolBook) -> float | None:
        return book.depth_qty(self.levels)[0]


class AskQtyTracker(Tracker):
    def __init__(self, levels: int) -> None:
        super().__init__(f"ask_qty({levels})")
        self.levels = levels

    def value(self, book: SymbolBook) -> float | None:
        return book.depth_qty(self.levels)[1]


class DepthImbalanceTracker(Tracker):
    """(bid - ask) / (bid + ask) of the resting sizes above: +1 all on the bid."""

    def __init__(self, levels: int) -> None:
        super().__init__(f"depth_imbalance({levels})")
        self.levels = levels

    def value(self, book: SymbolBook) -> float | None:
        bid_qty, ask_qty = book.depth_qty(self.levels)
        if bid_qty is None or ask_qty is None or bid_qty + ask_qty <= 0.0:
            return None
        return (bid_qty - ask_qty) / (bid_qty + ask_qty)


MID = MidTracker()


class TimeMean:
    """Time-weighted means of several tracked quantities (one slot each)."""

    __slots__ = ("area", "opening", "span")

    def __init__(self, slots: int) -> None:
        self.area = [0.0] * slots
        self.span = [0] * slots
        self.opening: list[float | None] = [None] * slots

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        if value is None:
            return
        begin = since if since > start else start
        if until > begin:
            self.area[slot] += value * (until - begin)
            self.span[slot] += until - begin

    def mean(self, slot: int, empty_window: bool) -> float | None:
        if self.span[slot] > 0:
            return self.area[slot] / self.span[slot]
        return self.opening[slot] if empty_window else None

    def to_state(self) -> list[Any]:
        return [list(self.area), list(self.span), list(self.opening)]

    def restore(self, data: list[Any]) -> None:
        self.area = [float(v) for v in data[0]]
        self.span = [int(v) for v in data[1]]
        self.opening = list(data[2])


# -- mid -----------------------------------------------------------------------------------

MID_COLUMNS = (
    Column("mid_open", "float64", True, "first mid that held for a positive time in the window"),
    Column("mid_high", "float64", True, "highest mid that held for a positive time in the window, or mid_close"),
    Column("mid_low", "float64", True, "lowest mid that held for a positive time in the window, or mid_close"),
    Column("mid_close", "float64", True, "mid of the closing book (after the bar's last message)"),
    Column("microprice_close", "float64", True, "size-weighted mid of the closing book: (b·qa + a·qb) / (qb + qa)"),
)


class MidAccumulator(Accumulator):
    __slots__ = ("close", "first", "high", "low", "micro", "opening", "seen")

    def __init__(self) -> None:
        self.opening: float | None = None
        self.seen = False  # a mid held for a positive time in the window
        self.first = 0.0
        self.high = 0.0
        self.low = 0.0
        self.close: float | None = None
        self.micro: float | None = None

    def opened(self, slot: int, value: float | None) -> None:
        self.opening = value

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        if value is None or until <= (since if since > start else start):
            return
        if not self.seen:
            self.seen = True
            self.first = self.high = self.low = value
        elif value > self.high:
            self.high = value
        elif value < self.low:
            self.low = value

    def closing(self, book: SymbolBook) -> None:
        self.close = book.mid()
        self.micro = microprice(book)

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        first: float | None = None
        values: list[float] = []
        if self.seen:
            first = self.first
            values = [self.high, self.low]
        elif empty_window and self.opening is not None:
            first = self.opening
            values = [self.opening]
        if self.close is not None:
            values.append(self.close)
        row.append(first)
        row.append(max(values) if values else None)
        row.append(min(values) if values else None)
        row.append(self.close)
        row.append(self.micro)

    def to_state(self) -> list[Any]:
        return [self.opening, self.seen, self.first, self.high, self.low, self.close, self.micro]

    def restore(self, data: list[Any]) -> None:
        self.opening, self.seen = data[0], bool(data[1])
        self.first, self.high, self.low = data[2], data[3], data[4]
        self.close, self.micro = data[5], data[6]


class MidGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__(
            "mid", "the mid's open, high, low and close; the closing microprice", MID_COLUMNS, (MID,), False, True
        )

    def accumulator(self) -> Accumulator:
        return MidAccumulator()


# -- cost ----------------------------------------------------------------------------------

COST_COLUMNS = (
    Column("rel_spread_bps_mean", "float64", True, "time-weighted mean of 10,000·(ask - bid)/mid in the window"),
    Column(
        "effective_spread", "float64", True, "volume-weighted mean of 2·abs(px - mid) over trades with a prevailing mid"
    ),
    Column("effective_spread_bps", "float64", True, "volume-weighted mean of 10,000·2·abs(px - mid)/mid, same trades"),
)


class CostAccumulator(Accumulator):
    __slots__ = ("bps_sum", "mean", "spread_sum", "weight")

    def __init__(self) -> None:
        self.mean = TimeMean(1)
        self.spread_sum = 0.0  # Σ qty·2|px - mid|
        self.bps_sum = 0.0  # Σ qty·10,000·2|px - mid|/mid
        self.weight = 0.0  # Σ qty of trades with a prevailing mid

    def trade(self, px: float, qty: float, sign: int, book: SymbolBook) -> None:
        mid = book.mid()  # the book before the trade's message: the prevailing quote
        if mid is None or mid <= 0.0:
            return
        spread = 2.0 * abs(px - mid)
        self.spread_sum += qty * spread
        self.bps_sum += qty * 10_000.0 * spread / mid
        self.weight += qty

    def opened(self, slot: int, value: float | None) -> None:
        self.mean.opening[slot] = value

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        self.mean.held(slot, value, since, until, start)

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        row.append(self.mean.mean(0, empty_window))
        if self.weight > 0.0:
            row.append(self.spread_sum / self.weight)
            row.append(self.bps_sum / self.weight)
        else:
            row.extend((None, None))

    def to_state(self) -> list[Any]:
        return [self.mean.to_state(), self.spread_sum, self.bps_sum, self.weight]

    def restore(self, data: list[Any]) -> None:
        self.mean.restore(data[0])
        self.spread_sum, self.bps_sum, self.weight = data[1], data[2], data[3]


class CostGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__(
            "cost",
            "relative quoted spread and effective spread (what trading cost)",
            COST_COLUMNS,
            (RelSpreadTracker(),),
            on_trade=True,
        )

    def accumulator(self) -> Accumulator:
        return CostAccumulator()


# -- depth ---------------------------------------------------------------------------------

DEPTH_COLUMNS = (
    Column("bid_qty_mean", "float64", True, "time-weighted mean bid size (depth books: best statistics.depth_levels)"),
    Column("ask_qty_mean", "float64", True, "time-weighted mean ask size (depth books: best statistics.depth_levels)"),
    Column("depth_imbalance_mean", "float64", True, "time-weighted mean of (bid_qty - ask_qty)/(bid_qty + ask_qty)"),
)


class DepthAccumulator(Accumulator):
    __slots__ = ("mean",)

    def __init__(self) -> None:
        self.mean = TimeMean(3)

    def opened(self, slot: int, value: float | None) -> None:
        self.mean.opening[slot] = value

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        self.mean.held(slot, value, since, until, start)

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        mean = self.mean
        row.extend((mean.mean(0, empty_window), mean.mean(1, empty_window), mean.mean(2, empty_window)))

    def to_state(self) -> list[Any]:
        return self.mean.to_state()

    def restore(self, data: list[Any]) -> None:
        self.mean.restore(data)


class DepthGroup(StatGroup):
    def __init__(self, levels: int = 5) -> None:
        super().__init__(
            "depth",
            "time-weighted resting size at the best bid and ask, and their imbalance",
            DEPTH_COLUMNS,
            (BidQtyTracker(levels), AskQtyTracker(levels), DepthImbalanceTracker(levels)),
        )
        self.levels = levels
        self.label = f"depth({levels})"

    def accumulator(self) -> Accumulator:
        return DepthAccumulator()

    def configured(self, options: StatOptions) -> StatGroup:
        return DepthGroup(options.depth_levels)


# -- flow ----------------------------------------------------------------------------------

FLOW_COLUMNS = (
    Column(
        "ofi",
        "float64",
        True,
        "order-flow imbalance (Cont, Kukanov & Stoikov 2014) summed over the bar's top-of-book changes",
    ),
)


class FlowAccumulator(Accumulator):
    """Σ e_n over the bar's messages whose book before and after both have a full top of
    book (live, both prices and sizes): e_n = 1{Pb ≥ Pb'}·qb - 1{Pb ≤ Pb'}·qb' -
    1{Pa ≤ Pa'}·qa + 1{Pa ≥ Pa'}·qa' (primes: before the message)."""

    __slots__ = ("events", "ofi")

    def __init__(self) -> None:
        self.ofi = 0.0
        self.events = 0

    def quote(
        self, bid_px: float | None, bid_qty: float | None, ask_px: float | None, ask_qty: float | None, book: SymbolBook
    ) -> None:
        if bid_px is None or bid_qty is None or ask_px is None or ask_qty is None or not book.is_live:
            return
        bid, bq, ask, aq = book.bid_px, book.bid_qty, book.ask_px, book.ask_qty
        if bid is None or bq is None or ask is None or aq is None:
            return
        e = 0.0
        if bid >= bid_px:
            e += bq
        if bid <= bid_px:
            e -= bid_qty
        if ask <= ask_px:
            e -= aq
        if ask >= ask_px:
            e += ask_qty
        self.ofi += e
        self.events += 1

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        row.append(self.ofi if self.events else None)

    def to_state(self) -> list[Any]:
        return [self.ofi, self.events]

    def restore(self, data: list[Any]) -> None:
        self.ofi, self.events = data[0], int(data[1])


class FlowGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__("flow", "order-flow imbalance at the top of book", FLOW_COLUMNS, on_quote=True)

    def accumulator(self) -> Accumulator:
        return FlowAccumulator()


# -- crossing ----------------------------------------------------------------------------

CROSSING_COLUMNS = (
    Column("crossed_messages", "int64", False, "messages of the bar after which the live book was crossed (bid > ask)"),
    Column("locked_messages", "int64", False, "messages of the bar after which the live book was locked (bid = ask)"),
)


class CrossingAccumulator(Accumulator):
    __slots__ = ("crossed", "locked")

    def __init__(self) -> None:
        self.crossed = 0
        self.locked = 0

    def quote(
        self, bid_px: float | None, bid_qty: float | None, ask_px: float | None, ask_qty: float | None, book: SymbolBook
    ) -> None:
        bid, ask = book.bid_px, book.ask_px
        if bid is not None and ask is not None and book.is_live:
            if bid > ask:
                self.crossed += 1
            elif bid == ask:
                self.locked += 1

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        row.append(self.crossed)
        row.append(self.locked)

    def to_state(self) -> list[Any]:
        return [self.crossed, self.locked]

    def restore(self, data: list[Any]) -> None:
        self.crossed, self.locked = int(data[0]), int(data[1])


class CrossingGroup(StatGroup):
    def __init__(self) -> None:
        super().__init__("crossing", "crossed and locked books, counted", CROSSING_COLUMNS, on_quote=True)

    def accumulator(self) -> Accumulator:
        return CrossingAccumulator()


# -- rv ------------------------------------------------------------------------------------

RV_COLUMNS = (
    Column(
        "realized_var",
        "float64",
        True,
        "Σ squared log returns of the mid sampled every statistics.rv_sample_ms from the bar's start, "
        "and at its end (null: no return)",
    ),
)


class RealizedVarAccumulator(Accumulator):
    """Samples the mid in effect at start, start + Δ, ... inside the window and the mid
    in effect at its end; a sample without a mid breaks the chain of returns."""

    __slots__ = ("current", "last", "next_k", "returns", "sample_ns", "seen", "total")

    def __init__(self, sample_ns: int) -> None:
        self.sample_ns = sample_ns
        self.next_k = 0  # the next grid point to sample: start + next_k·Δ
        self.last: float | None = None  # the last sample
        self.total = 0.0
        self.returns = 0
        self.seen = False  # some value held for a positive time: ``current`` is the latest
        self.current: float | None = None

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        begin = since if since > start else start
        if until <= begin:
            return
        step = self.sample_ns
        k = -((start - begin) // step)  # the first grid point at or after begin
        if k < self.next_k:
            k = self.next_k
        if start + k * step < until:
            self._sample(value)
            self.next_k = (until - 1 - start) // step + 1
        self.seen = True
        self.current = value

    def _sample(self, value: float | None) -> None:
        last = self.last
        if value is not None and last is not None and value > 0.0 and last > 0.0:
            r = math.log(value / last)
            self.total += r * r
            self.returns += 1
        self.last = value

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        total, returns = self.total, self.returns
        last, current = self.last, self.current
        if self.seen and current is not None and last is not None and current > 0.0 and last > 0.0:
            r = math.log(current / last)  # the end of the window
            total += r * r
            returns += 1
        row.append(total if returns else None)

    def to_state(self) -> list[Any]:
        return [self.next_k, self.last, self.total, self.returns, self.seen, self.current]

    def restore(self, data: list[Any]) -> None:
        self.next_k, self.last, self.total, self.returns = int(data[0]), data[1], data[2], int(data[3])
        self.seen, self.current = bool(data[4]), data[5]


class RealizedVarGroup(StatGroup):
    def __init__(self, sample_ns: int = 1_000_000_000) -> None:
        super().__init__("rv", "realized variance of the mid", RV_COLUMNS, (MID,))
        self.sample_ns = sample_ns
        self.label = f"rv({format_duration_ns(sample_ns)})"

    def accumulator(self) -> Accumulator:
        return RealizedVarAccumulator(self.sample_ns)

    def configured(self, options: StatOptions) -> StatGroup:
        return RealizedVarGroup(options.rv_sample_ns)


MID_GROUP = register_group(MidGroup())
COST = register_group(CostGroup())
DEPTH = register_group(DepthGroup())
FLOW = register_group(FlowGroup())
CROSSING = register_group(CrossingGroup())
RV = register_group(RealizedVarGroup())
