"""Event families that close on the trade at which an amount reaches a threshold:
``trades:<N>`` (trade count), ``volume:<Q>`` (Σ qty), ``notional:<X>`` (Σ px·qty).

A bar opens with a trade and closes on the first trade at which its amount reaches
the threshold; that whole trade belongs to the bar (no splitting). Volume and notional
compare with a relative tolerance of 1e-9, so that ten trades of 0.1 do reach 1.
"""

from __future__ import annotations

import math
import re
from typing import TYPE_CHECKING, Any, Final

from barsmith.bars.family import NEVER, BarFamily, SpecContext, register_family
from barsmith.errors import BarSpecError

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

# A sum of decimal quantities (0.1 + 0.2 ...) that equals the threshold on paper lands a
# hair below it in binary floating point: compare with this relative tolerance.
THRESHOLD_RTOL: Final = 1e-9

_NUMBER: Final = re.compile(r"^\s*[0-9]+(\.[0-9]*)?([eE][+-]?[0-9]+)?\s*$")


class ThresholdFamily(BarFamily):
    """Shared by the three: the bar's progress (``bar.progress``) against a limit."""

    def __init__(self, keyword: str, threshold: float) -> None:
        super().__init__(keyword, closes_by_time=False, opens_on_trade=True, counts_trades=True)
        self.threshold = threshold
        self.limit = threshold * (1.0 - THRESHOLD_RTOL)

    def window(self, t: int, state: Any) -> tuple[int, int, int]:
        return t, t, NEVER


class TradeCountFamily(ThresholdFamily):
    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        bar.end = t
        bar.progress += 1.0
        return bar.progress >= self.limit


class VolumeFamily(ThresholdFamily):
    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        bar.end = t
        bar.progress += qty
        return bar.progress >= self.limit


class NotionalFamily(ThresholdFamily):
    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        bar.end = t
        bar.progress += px * qty
        return bar.progress >= self.limit


def parse_trade_count(text: str, arg: str, context: SpecContext) -> BarFamily:
    if not arg.strip().isdigit() or int(arg) <= 0:
        raise BarSpecError(f"bad bar spec {text!r}: trades needs a whole number of trades > 0")
    return TradeCountFamily("trades", float(int(arg)))


def _amount(keyword: str, text: str, arg: str) -> float:
    if _NUMBER.match(arg) is None or not math.isfinite(float(arg)) or float(arg) <= 0.0:
        raise BarSpecError(f"bad bar spec {text!r}: {keyword} needs a number > 0")
    return float(arg)


def parse_volume(text: str, arg: str, context: SpecContext) -> BarFamily:
    return VolumeFamily("volume", _amount("volume", text, arg))


def parse_notional(text: str, arg: str, context: SpecContext) -> BarFamily:
    return NotionalFamily("notional", _amount("notional", text, arg))


register_family("trades", parse_trade_count)
register_family("volume", parse_volume)
register_family("notional", parse_notional)
