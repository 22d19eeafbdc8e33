"""The source interfaces: anything that yields ordered batches of decoded records, and
the live kind whose partitions come and go with a consumer group."""

from __future__ import annotations

import time
import types
from collections.abc import AsyncIterator, Generator, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

from barsmith.ingest.rejects import Reject

if TYPE_CHECKING:
    import asyncio


@types.coroutine
def pause() -> Generator[None, None, None]:
    """Let the run loop look at signals and housekeeping between two batches: what
    ``asyncio.sleep(0)`` does (one bare yield), without needing asyncio -- so a
    replay can run without an event loop (see :meth:`barsmith.runner.Runner.run`)."""
    yield


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


class PartitionPosition:
    """Where one assigned partition of a live source stands."""

    __slots__ = ("committed", "generation", "highwater", "last_record_wall", "next_offset", "partition", "topic")

    def __init__(self, topic: str, partition: int) -> None:
        self.topic = topic
        self.partition = partition
        self.next_offset: int | None = None  # one past the last processed record
        self.committed: int | None = None
        self.last_record_wall = time.monotonic()
        self.highwater: int | None = None
        self.generation = 0  # bumped by every seek: records fetched before it are stale

    @property
    def lag(self) -> int | None:
        if self.highwater is None:
            return None
        if self.next_offset is None:
            # Nothing consumed yet: known only for an empty partition.
            return 0 if self.highwater == 0 else None
        return max(0, self.highwater - self.next_offset)

    @property
    def token(self) -> tuple[PartitionPosition, int]:
        """What the partition looks like now: a batch fetched now carries it (see :func:`current_position`)."""
        return self, self.generation


def current_position(
    positions: Mapping[str, PartitionPosition], stream: str, token: tuple[PartitionPosition, int] | None
) -> PartitionPosition | None:
    """``stream``'s position if ``token`` (taken when records were fetched) is still
    valid — the partition neither reassigned nor sought since; None when stale."""
    if token is None:
        return None
    fetched, generation = token
    position = positions.get(stream)
    return position if position is fetched and position.generation == generation else None


def uncommitted(positions: Mapping[str, PartitionPosition], streams: list[str] | None) -> dict[str, int]:
    """The processed offsets of ``streams`` (default: all) that the group has not committed yet."""
    return {
        stream: position.next_offset
        for stream, position in positions.items()
        if (streams is None or stream in streams)
        and position.next_offset is not None
        and position.next_offset != position.committed
    }


class PartitionListener(Protocol):
    """Told when a live source's consumer group gives or takes partitions (by stream name)."""

    async def on_assigned(self, streams: list[str]) -> None: ...

    async def on_revoked(self, streams: list[str]) -> None:
        """Before the partitions go: the last moment to checkpoint or commit them."""
        ...


class SourcePositions(Protocol):
    """The assigned partitions of a live source and how to move them: what a delivery
    strategy may touch of the source."""

    partitions: dict[str, PartitionPosition]

    async def seek(self, stream: str, offset: int | None) -> None:
        """Continue ``stream`` at ``offset`` (None: the partition's beginning)."""
        ...

    def pause(self, stream: str) -> None: ...

    def resume(self, stream: str) -> None: ...

    async def committed_offset(self, stream: str) -> int | None:
        """The consumer group's committed offset of ``stream``, if any."""
        ...

    async def commit(self, streams: list[str] | None = None) -> dict[str, int]:
        """Commit the processed offsets of ``streams`` (default: all assigned)."""
        ...


class LiveSource(Source, SourcePositions, Protocol):
    """A source whose partitions are assigned and revoked by a consumer group.

    ``batches()`` yields one batch per partition per fetch (an empty heartbeat batch
    when nothing came) until stopped. A batch's ``end_position`` is where its partition
    continues; its ``token`` tells :meth:`current` whether it is still valid.
    """

    started: asyncio.Event
    # Records whose key is none of their ticks' symbols, by stream, since start (the
    # value's ``sym`` decides the symbol; the key only placed the record).
    key_mismatches: dict[str, int]

    async def start(self, listener: PartitionListener) -> None:
        """Join the group; ``listener`` hears of every assignment and revocation."""
        ...

    def fail(self, exc: BaseException) -> None:
        """Stop with ``exc``: ``batches()`` raises it (for errors in listener callbacks)."""
        ...

    def current(self, batch: RecordBatch) -> PartitionPosition | None:
        """``batch``'s partition position if the batch is still valid, else None. The
        caller sets ``next_offset = batch.end_position`` once it has processed it."""
        ...


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
