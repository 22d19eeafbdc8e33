"""Information-driven bars: ``tick-imbalance:``, ``volume-imbalance:``, ``notional-imbalance:``.

After López de Prado (2018, ch. 2). Each trade gets the *tick rule* sign b: +1 when
its price is above the symbol's previous trade price, -1 below, the previous sign
when equal (0 before the symbol's first price change is seen). Its contribution x is
b (tick), b·qty (volume) or b·px·qty (notional). A bar accumulates θ = Σ x over its
T trades and closes on the trade at which

    T >= min_length  and  |θ| >= E[T] · |E[x]|,    or  T >= max_length,

where E[T] is the expected bar length (trades) and E[x] the expected contribution per
trade. Both are exponentially weighted averages over the symbol's earlier bars,
updated at each close with a = 2 / (span + 1): E[T] ← a·T + (1 - a)·E[T],
E[x] ← a·θ/T + (1 - a)·E[x]. A symbol's first bar has no E[x] yet: it closes after
the initial expected length E0[T] trades, and its θ/T becomes the first E[x].

The spec is ``<family>:<E0[T]>[,span=<bars>][,bound=<factor>]``:

* ``E0[T]`` (required) -- the initial expected bar length in trades (a number >= 1);
* ``span`` (default 10) -- the EWMA span in bars of both expectations;
* ``bound`` (default 10) -- min_length = ceil(E0[T] / bound), max_length =
  ceil(E0[T] · bound): a vanishing E[x] (threshold near 0) cannot give one-trade bars
  forever, nor a large one bars that never close; E[T] stays between the two.

The tick-rule memory, the expectations and the open bar's θ and T are per-symbol
state (they outlive bars and are kept in checkpoints). Bars carry ``imbalance`` (θ at
the close) and ``imbalance_threshold`` (E[T]·|E[x]| it was compared with; null for a
first bar, which closes on its length).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any, Final

from barsmith.bars.columns import Column
from barsmith.bars.family import NEVER, BarFamily, SpecContext, register_family
from barsmith.errors import BarSpecError

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

DEFAULT_SPAN: Final = 10
DEFAULT_BOUND: Final = 10.0

COLUMNS: Final = (
    Column(
        "imbalance",
        "float64",
        False,
        "imbalance bars: θ, the sum of the bar's signed trades (b, b·qty or b·px·qty; b the tick-rule sign)",
    ),
    Column(
        "imbalance_threshold",
        "float64",
        True,
        "imbalance bars: E[T]·abs(E[x]) the bar was compared with (null: a symbol's first bar, closed on its length)",
    ),
)

TICK: Final = 0
VOLUME: Final = 1
NOTIONAL: Final = 2


class ImbalanceState:
    """One symbol's state for one imbalance spec."""

    __slots__ = (
        "expected_length",
        "expected_x",
        "has_expectation",
        "has_price",
        "last_px",
        "last_sign",
        "length",
        "theta",
    )

    def __init__(self, expected_length: float) -> None:
        self.has_price = False  # a trade of the symbol was seen: last_px is its price
        self.last_px = 0.0
        self.last_sign = 0  # the tick rule's sign of the last trade (0: no price change seen yet)
        self.expected_length = expected_length
        self.expected_x = 0.0
        self.has_expectation = False  # E[x] is known (a bar has closed)
        self.theta = 0.0  # the open bar's imbalance
        self.length = 0  # the open bar's trades


class ImbalanceFamily(BarFamily):
    """An imbalance bar family (see the module docstring)."""

    def __init__(self, keyword: str, measure: int, initial_length: float, span: int, bound: float) -> None:
        super().__init__(keyword, closes_by_time=False, opens_on_trade=True, counts_trades=True, columns=COLUMNS)
        self.measure = measure
        self.initial_length = initial_length
        self.alpha = 2.0 / (span + 1.0)
        self.min_length = max(1, math.ceil(initial_length / bound))
        self.max_length = max(self.min_length, math.ceil(initial_length * bound))

    def window(self, t: int, state: Any) -> tuple[int, int, int]:
        return t, t, NEVER

    def new_state(self, symbol: str) -> Any:
        return ImbalanceState(self.initial_length)

    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        s: ImbalanceState = state
        bar.end = t
        if s.has_price:  # the tick rule; an unchanged price keeps the last sign
            if px > s.last_px:
                s.last_sign = 1
            elif px < s.last_px:
                s.last_sign = -1
        s.last_px = px
        s.has_price = True
        x = float(s.last_sign)
        if self.measure == VOLUME:
            x *= qty
        elif self.measure == NOTIONAL:
            x *= px * qty
        s.theta += x
        s.length += 1
        bar.progress = s.theta
        length = s.length
        if length >= self.max_length:
            return self._close(bar, s)
        if not s.has_expectation:
            return self._close(bar, s) if length >= self.initial_length else False
        if length >= self.min_length and abs(s.theta) >= s.expected_length * abs(s.expected_x):
            return self._close(bar, s)
        return False

    def _close(self, bar: OpenBar, s: ImbalanceState) -> bool:
        threshold = s.expected_length * abs(s.expected_x) if s.has_expectation else None
        bar.tag = [s.theta, threshold]
        alpha = self.alpha
        mean_x = s.theta / s.length
        s.expected_length = alpha * s.length + (1.0 - alpha) * s.expected_length
        s.expected_x = alpha * mean_x + (1.0 - alpha) * s.expected_x if s.has_expectation else mean_x
        s.has_expectation = True
        s.theta = 0.0
        s.length = 0
        return True

    def emit(self, row: list[Any], bar: OpenBar, state: Any, index: dict[str, int]) -> None:
        tag = bar.tag
        if tag is None:  # emitted before its close (input ended): the bar as it stands
            s: ImbalanceState = state
            tag = [s.theta, s.expected_length * abs(s.expected_x) if s.has_expectation else None]
        row[index["imbalance"]] = tag[0]
        row[index["imbalance_threshold"]] = tag[1]

    def state_to_data(self, state: Any) -> Any:
        s: ImbalanceState = state
        return [
            s.has_price,
            s.last_px,
            s.last_sign,
            s.expected_length,
            s.expected_x,
            s.has_expectation,
            s.theta,
            s.length,
        ]

    def state_from_data(self, symbol: str, data: Any) -> Any:
        s = ImbalanceState(self.initial_length)
        s.has_price, s.last_px, s.last_sign = bool(data[0]), float(data[1]), int(data[2])
        s.expected_length, s.expected_x, s.has_expectation = float(data[3]), float(data[4]), bool(data[5])
        s.theta, s.length = float(data[6]), int(data[7])
        return s


def _parse(keyword: str, measure: int) -> Any:
    def parse(text: str, arg: str, context: SpecContext) -> BarFamily:
        head, *options = [part.strip() for part in arg.split(",")]
        usage = f"bad bar spec {text!r}: {keyword} needs <expected trades per bar>[,span=<bars>][,bound=<factor>]"
        try:
            initial = float(head)
        except ValueError:
            raise BarSpecError(usage) from None
        if not math.isfinite(initial) or initial < 1.0:
            raise BarSpecError(f"{usage}; the expected length is a number >= 1")
        span, bound = DEFAULT_SPAN, DEFAULT_BOUND
        for option in options:
            name, eq, value = option.partition("=")
            try:
                if name.strip() == "span" and eq and int(value) >= 1:
                    span = int(value)
                elif name.strip() == "bound" and eq and math.isfinite(float(value)) and float(value) > 1.0:
                    bound = float(value)
                else:
                    raise ValueError(option)
            except ValueError:
                raise BarSpecError(f"{usage} (span a whole number >= 1, bound a number > 1): {option!r}") from None
        return ImbalanceFamily(keyword, measure, initial, span, bound)

    return parse


register_family("tick-imbalance", _parse("tick-imbalance", TICK), COLUMNS)
register_family("volume-imbalance", _parse("volume-imbalance", VOLUME), COLUMNS)
register_family("notional-imbalance", _parse("notional-imbalance", NOTIONAL), COLUMNS)
