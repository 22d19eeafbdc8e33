"""Parsing of human-friendly durations (``500ms``, ``1m``, ``2h``) into integer nanoseconds."""

from __future__ import annotations

import re
from typing import Final

from barsmith.errors import ConfigError

NS_PER_UNIT: Final[dict[str, int]] = {
    "ns": 1,
    "us": 1_000,
    "ms": 1_000_000,
    "s": 1_000_000_000,
    "m": 60_000_000_000,
    "h": 3_600_000_000_000,
    "d": 86_400_000_000_000,
}
_DURATION: Final = re.compile(r"^\s*(\d+)\s*(ns|us|ms|s|m|h|d)\s*$")


def parse_duration_ns(text: str, *, allow_zero: bool = False) -> int:
    """``"500ms"`` → 500_000_000. Whole numbers with a unit (ns, us, ms, s, m, h, d)."""
    match = _DURATION.match(text)
    if match is None:
        raise ConfigError(f"not a duration: {text!r} (expected a whole number and a unit: ns, us, ms, s, m, h, d)")
    value = int(match.group(1)) * NS_PER_UNIT[match.group(2)]
    if value == 0 and not allow_zero:
        raise ConfigError(f"duration must be positive: {text!r}")
    return value


def format_duration_ns(value_ns: int) -> str:
    """The largest exact unit: 60_000_000_000 → ``"1m"``."""
    if value_ns == 0:
        return "0s"
    for unit in ("d", "h", "m", "s", "ms", "us"):
        size = NS_PER_UNIT[unit]
        if value_ns % size == 0:
            return f"{value_ns // size}{unit}"
    return f"{value_ns}ns"
