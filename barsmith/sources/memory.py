"""A test double of :class:`~barsmith.sources.base.LiveSource`: a topic in memory, consumed
as a consumer group member would, for tests of the service without a broker.

As the Kafka source, it never yields a record before its partition's processed
position (``next_offset``). The test plays the group: :meth:`MemoryLiveSource.assign` and
:meth:`MemoryLiveSource.revoke` call the listener as a rebalance does. Offsets are
list indexes; the group's committed offsets live in :attr:`MemoryTopic.committed`
(by stream name), where :class:`~barsmith.bus.checkpoints.MemoryCheckpointBus` also
commits exactly-once offsets when given that dict.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import AsyncIterator, Sequence
from typing import Any

from barsmith.bus.topics import stream_name
from barsmith.errors import StateError
from barsmith.sources.base import (
    PartitionListener,
    PartitionPosition,
    RecordBatch,
    current_position,
    uncommitted,
)


class MemoryTopic:
    """Per partition, decoded records (offset = index); the group's committed offsets."""

    def __init__(self, name: str, partitions: Sequence[Sequence[Any]]) -> None:
        self.name = name
        self.records: list[list[Any]] = [list(records) for records in partitions]
        self.committed: dict[str, int] = {}

    def stream(self, partition: int) -> str:
        return stream_name(self.name, partition)

    def publish(self, partitions: Sequence[Sequence[Any]]) -> None:
        """More input arrives: ``partitions[i]`` is appended to partition i."""
        for stored, records in zip(self.records, partitions, strict=True):
            stored.extend(records)


class MemoryLiveSource:
    """Consumes a :class:`MemoryTopic` in batches of ``batch_records``; ``assigned``
    partitions (default: all) are given at start."""

    def __init__(
        self,
        topic: MemoryTopic,
        *,
        batch_records: int = 64,
        pause_on_assign: bool = False,
        assigned: Sequence[int] | None = None,
        idle_poll_s: float = 0.002,
    ) -> None:
        self.topic = topic
        self.partitions: dict[str, PartitionPosition] = {}
        self.pause_on_assign = pause_on_assign
        self.started = asyncio.Event()
        self.key_mismatches: dict[str, int] = {}  # records in memory have no keys
        self._batch_records = batch_records
        self._initial = list(range(len(topic.records))) if assigned is None else list(assigned)
        self._idle_poll_s = idle_poll_s
        self._fetch: dict[str, int] = {}  # the consumer's fetch position, ahead of next_offset
        self._paused: set[str] = set()
        self._listener: PartitionListener | None = None
        self._stopped = False
        self._failure: BaseException | None = None

    # -- the group, played by the test --------------------------------------------------

    async def start(self, listener: PartitionListener) -> None:
        self._listener = listener
        self.started.set()
        await self.assign(self._initial)

    async def assign(self, partitions: Sequence[int]) -> None:
        """The group gives ``partitions``: fetching starts at the group's committed offset."""
        streams = []
        for partition in partitions:
            stream = self.topic.stream(partition)
            self.partitions[stream] = PartitionPosition(self.topic.name, partition)
            self._fetch[stream] = self.topic.committed.get(stream, 0)
            if self.pause_on_assign:
                self._paused.add(stream)
            streams.append(stream)
        await self._told().on_assigned(streams)

    async def revoke(self, partitions: Sequence[int]) -> None:
        """The group takes ``partitions`` away (the listener hears it first)."""
        streams = [s for s in map(self.topic.stream, partitions) if s in self.partitions]
        await self._told().on_revoked(streams)
        for stream in streams:
            del self.partitions[stream], self._fetch[stream]
            self._paused.discard(stream)

    def _told(self) -> PartitionListener:
        if self._listener is None:
            raise StateError("the memory source was not started")
        return self._listener

    # -- Source --------------------------------------------------------------------------

    async def batches(self) -> AsyncIterator[RecordBatch]:
        while not self._stopped:
            fetched = False
            for stream, position in list(self.partitions.items()):
                batch = self._fetch_batch(stream, position)
                if batch is None:
                    continue
                fetched = True
                yield batch
                await asyncio.sleep(0)  # rebalance callbacks may run between partitions
                if self._stopped:
                    break
            if not fetched:
                yield RecordBatch("", "", [], [])  # heartbeat: lets housekeeping run
                await asyncio.sleep(self._idle_poll_s)
        if self._failure is not None:
            raise self._failure

    def _fetch_batch(self, stream: str, position: PartitionPosition) -> RecordBatch | None:
        if stream in self._paused or self.partitions.get(stream) is not position:
            return None  # paused, or revoked while the others were processed
        stored = self.topic.records[position.partition]
        start = max(self._fetch[stream], position.next_offset or 0)  # never read twice
        records = stored[start : start + self._batch_records]
        position.highwater = len(stored)
        if not records:
            return None
        end = start + len(records)
        self._fetch[stream] = end
        position.last_record_wall = time.monotonic()
        batch = RecordBatch(stream, stream, list(records), list(range(start, end)), end_position=end)
        batch.token = position.token
        return batch

    def progress(self) -> tuple[int, int] | None:
        return None

    def stop(self) -> None:
        self._stopped = True

    def fail(self, exc: BaseException) -> None:
        self._failure = exc
        self._stopped = True

    async def close(self) -> None:
        return None

    # -- positions -------------------------------------------------------------------------

    def current(self, batch: RecordBatch) -> PartitionPosition | None:
        return current_position(self.partitions, batch.stream, batch.token)

    async def seek(self, stream: str, offset: int | None) -> None:
        position = self.partitions[stream]
        self._fetch[stream] = offset or 0
        position.next_offset = offset
        position.generation += 1

    def pause(self, stream: str) -> None:
        if stream in self.partitions:
            self._paused.add(stream)

    def resume(self, stream: str) -> None:
        if stream not in self.partitions:
            raise StateError(f"partition {stream} is not assigned here")
        self._paused.discard(stream)

    async def committed_offset(self, stream: str) -> int | None:
        return self.topic.committed.get(stream)

    async def commit(self, streams: list[str] | None = None) -> dict[str, int]:
        offsets = uncommitted(self.partitions, streams)
        for stream, offset in offsets.items():
            self.topic.committed[stream] = self.partitions[stream].committed = offset
        return offsets
