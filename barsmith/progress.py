"""A one-line progress bar on stderr, drawn only when stderr is a terminal."""

from __future__ import annotations

import sys
import time
from typing import TextIO

from barsmith.engine import EngineStats
from barsmith.sources.base import Source

_WIDTH = 28


class ProgressBar:
    """Redraws at most ``rate_hz`` times a second; :meth:`close` clears the line."""

    def __init__(self, stream: TextIO | None = None, rate_hz: float = 5.0) -> None:
        self._stream = stream if stream is not None else sys.stderr
        self._enabled = self._stream.isatty()
        self._every_s = 1.0 / rate_hz
        self._last = 0.0

    def __call__(self, source: Source, stats: EngineStats, elapsed_s: float) -> None:
        if not self._enabled:
            return
        now = time.monotonic()
        if now - self._last < self._every_s:
            return
        self._last = now
        rate = stats.records / elapsed_s if elapsed_s > 0 else 0.0
        progress = source.progress()
        if progress is not None and progress[1] > 0:
            fraction = min(1.0, progress[0] / progress[1])
            filled = int(fraction * _WIDTH)
            bar = "[" + "=" * filled + " " * (_WIDTH - filled) + f"] {fraction:6.1%}"
        else:
            bar = ""
        self._stream.write(f"\r{bar}  {stats.records:,} msgs  {rate:,.0f} msg/s   ")
        self._stream.flush()

    def close(self) -> None:
        if self._enabled:
            self._stream.write("\r" + " " * 80 + "\r")
            self._stream.flush()
