"""The sink interface: where finished bars (and rejected records) go."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

from barsmith.bars.bar import Bar
from barsmith.ingest.rejects import Reject


class BarSink(Protocol):
    """A plug-in bar sink: ``publish`` may buffer; ``flush`` makes everything published
    so far durable; ``close`` flushes and releases resources."""

    name: str

    async def publish(self, bars: Sequence[Bar]) -> None: ...

    async def flush(self) -> None: ...

    async def close(self) -> None: ...


class RejectSink(Protocol):
    """Where rejected records are kept (never silently dropped)."""

    async def write(self, rejects: Sequence[Reject]) -> None: ...

    async def close(self) -> None: ...


class MemorySink:
    """A test double that keeps everything in lists."""

    name = "memory"

    def __init__(self) -> None:
        self.bars: list[Bar] = []
        self.rejects: list[Reject] = []
        self.flushes = 0
        self.closed = False

    async def publish(self, bars: Sequence[Bar]) -> None:
        self.bars.extend(bars)

    async def flush(self) -> None:
        self.flushes += 1

    async def write(self, rejects: Sequence[Reject]) -> None:
        self.rejects.extend(rejects)

    async def close(self) -> None:
        self.closed = True
