"""The sink interface: where finished bars (and rejected records) go."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Protocol

from barsmith.bars.bar import Bar
from barsmith.ingest.rejects import Reject


class BarSink(Protocol):
    """A plug-in bar sink: ``publish`` may buffer; ``flush`` makes everything published
    so far durable; ``close`` flushes and releases resources. ``stream`` names the
    ordered input stream (engine) the bars came from."""

    name: str

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None: ...

    async def flush(self) -> None: ...

    async def close(self) -> None: ...


class CheckpointedSink(BarSink, Protocol):
    """A sink whose output commits with each input partition's checkpoint (exactly-once
    delivery). Per partition: ``prepare`` before the transaction (its result is stored
    in the checkpoint), ``committed`` after it, ``restore`` on assignment or after a
    failed transaction with the last committed result, ``release`` on revocation."""

    async def prepare(self, stream: str, offset: int, final: bool) -> Any: ...

    async def committed(self, stream: str, state: Any) -> None: ...

    async def restore(self, stream: str, state: Any, offset: int) -> None: ...

    def release(self, stream: str) -> None: ...


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

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        self.bars.extend(bars)

    async def flush(self) -> None:
        self.flushes += 1

    async def write(self, rejects: Sequence[Reject]) -> None:
        self.rejects.extend(rejects)

    async def close(self) -> None:
        self.closed = True
