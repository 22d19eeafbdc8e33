"""The ``time:<duration>`` family: half-open UTC intervals [k·Δ, (k+1)·Δ) aligned to the
epoch, closed by the watermark. A window rule of its own, so that a calendar-aware
window can replace it."""

from __future__ import annotations

from typing import Any

from barsmith.bars.family import BarFamily, SpecContext, register_family
from barsmith.errors import BarSpecError, ConfigError
from barsmith.units import parse_duration_ns


class TimeFamily(BarFamily):
    """Fixed intervals of ``interval_ns`` aligned to the Unix epoch."""

    def __init__(self, interval_ns: int) -> None:
        super().__init__("time", closes_by_time=True, opens_on_trade=False, counts_trades=False)
        self.interval_ns = interval_ns

    def window(self, t: int, state: Any) -> tuple[int, int, int]:
        start = t - t % self.interval_ns
        end = start + self.interval_ns
        return start, end, end


def parse_time(text: str, arg: str, context: SpecContext) -> BarFamily:
    try:
        return TimeFamily(parse_duration_ns(arg))
    except ConfigError as exc:
        raise BarSpecError(f"bad bar spec {text!r}: {exc}") from None


register_family("time", parse_time)
