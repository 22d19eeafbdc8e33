"""The source interface: anything that yields ordered batches of decoded records."""

from __future__ import annotations

from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from typing import Any, Protocol

from barsmith.ingest.rejects import Reject


@dataclass(slots=True)
class RecordBatch:
    """Records of one ordered stream, in order.

    ``stream`` keys the engine that owns the records (one per replay, one per Kafka
    partition); ``source`` names where they came from for the rejects file;
    ``positions[i]`` is the byte offset (file) or Kafka offset of ``records[i]``.
    ``rejects`` are records that failed before decoding (framing errors).
    ``end_position`` (live sources) is where the stream continues after this batch;
    ``token`` lets the source tell, when the batch is processed, whether the stream
    was rewound or reassigned since it was fetched.
    """

    stream: str
    source: str
    records: list[Any]
    positions: list[int]
    rejects: list[Reject] = field(default_factory=list)
    end_position: int | None = None
    token: Any = None


class Source(Protocol):
    """A plug-in source. ``batches()`` ends when the source is drained (replay) or when
    :meth:`stop` was called (live)."""

    def batches(self) -> AsyncIterator[RecordBatch]: ...

    def progress(self) -> tuple[int, int] | None:
        """(done, total) in bytes or records, when the source knows; else None."""
        ...

    def stop(self) -> None:
        """Ask the source to stop fetching; ``batches()`` then ends soon."""
        ...

    async def close(self) -> None: ...


class ListSource:
    """A test double: yields the given batches, then ends."""

    def __init__(self, batches: list[RecordBatch]) -> None:
        self._batches = batches
        self._stopped = False

    async def batches(self) -> AsyncIterator[RecordBatch]:
        for batch in self._batches:
            if self._stopped:
                return
            yield batch

    def progress(self) -> tuple[int, int] | None:
        return None

    def stop(self) -> None:
        self._stopped = True

    async def close(self) -> None:
        return None
