"""The sink interface: where finished bars (and rejected records) go."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Protocol

from barsmith.bars.record import Bar
from barsmith.errors import SinkError
from barsmith.ingest.rejects import Reject


class BarSink(Protocol):
    """A plug-in bar sink: ``start`` opens connections (before the first publish);
    ``publish`` may buffer; ``flush`` makes everything published so far durable;
    ``close`` flushes and releases resources. ``stream`` names the ordered input
    stream (engine) the bars came from. ``final_only``: with a revision window, the
    sink takes each bar once, when it can change no more, instead of every revision."""

    name: str
    final_only: bool

    async def start(self) -> None: ...

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

    def __init__(self, final_only: bool = False) -> None:
        self.final_only = final_only
        self.bars: list[Bar] = []
        self.rejects: list[Reject] = []
        self.flushes = 0
        self.closed = False

    async def start(self) -> None:
        return None

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        self.bars.extend(bars)

    async def flush(self) -> None:
        self.flushes += 1

    async def write(self, rejects: Sequence[Reject]) -> None:
        self.rejects.extend(rejects)

    async def close(self) -> None:
        self.closed = True


class MemoryCheckpointedSink(MemorySink):
    """A test double of :class:`CheckpointedSink`: a partition's bars (and rejects)
    become visible in ``bars`` (``rejects``) only when a checkpoint commits them, as on
    the bus with ``read_committed``; a restore or a release forgets what was not.
    ``fail_next_publish(exc)`` makes the next publish fail as a send to a broker that
    went away does (a :class:`~barsmith.errors.SinkError` raised from ``exc``).
    ``prepared`` holds each partition's last prepared state (what its next commit makes
    visible)."""

    name = "memory-checkpointed"

    def __init__(self) -> None:
        super().__init__()
        self._pending: dict[str, tuple[list[Bar], list[Reject]]] = {}
        self._failures: list[BaseException] = []
        self.prepared: dict[str, Any] = {}

    def fail_next_publish(self, exc: BaseException) -> None:
        self._failures.append(exc)

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        if self._failures:
            failure = self._failures.pop(0)
            raise SinkError(f"cannot publish bars of {stream}: {failure!r}") from failure
        self._for(stream)[0].extend(bars)

    async def write(self, rejects: Sequence[Reject]) -> None:
        for reject in rejects:
            self._for(reject.source)[1].append(reject)

    async def prepare(self, stream: str, offset: int, final: bool) -> Any:
        bars, rejects = self._for(stream)
        state = self.prepared[stream] = {"bars": len(bars), "rejects": len(rejects)}
        return state

    async def committed(self, stream: str, state: Any) -> None:
        bars, rejects = self._for(stream)
        self.bars.extend(bars[: state["bars"]])
        self.rejects.extend(rejects[: state["rejects"]])
        del bars[: state["bars"]], rejects[: state["rejects"]]

    async def restore(self, stream: str, state: Any, offset: int) -> None:
        self._pending.pop(stream, None)

    def release(self, stream: str) -> None:
        self._pending.pop(stream, None)

    def _for(self, stream: str) -> tuple[list[Bar], list[Reject]]:
        pending = self._pending.get(stream)
        if pending is None:
            pending = self._pending[stream] = ([], [])
        return pending
