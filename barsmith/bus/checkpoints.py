"""Exactly-once on Kafka: one transactional producer per input partition, and the
compacted state topic that holds each partition's latest checkpoint.

A partition's transaction carries its bars (the bus sink sends them with
:meth:`KafkaCheckpointBus.producer_for`), then its checkpoint (to the state topic,
key = stream name, partition = murmur2 of the key) and the next input offset for the
consumer group (``send_offsets_to_transaction``), and commits them together. The
transactional id is ``<group>.<topic>.<partition>``: starting a producer with it
fences any earlier owner of the partition and aborts that owner's open transaction.
Per-partition ids (rather than one producer per process) are what make the fencing
work with aiokafka, whose offset commits in a transaction carry no group generation.
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable, Callable, Sequence
from typing import TYPE_CHECKING, Any, Protocol

from barsmith.bus.clients import bar_producer, new_consumer, start_client, stop_client
from barsmith.bus.topics import ensure_topic, partition_for
from barsmith.errors import SinkError, StateError

if TYPE_CHECKING:
    from barsmith.settings import Settings

# The state topic keeps the latest checkpoint per key; small segments let the
# log cleaner drop superseded checkpoints soon, so a restore reads little.
STATE_TOPIC_CONFIGS = {
    "cleanup.policy": "compact",
    "segment.ms": "600000",
    "segment.bytes": str(64 * 1024 * 1024),
    "min.cleanable.dirty.ratio": "0.1",
}
_ABORT_TIMEOUT_S = 10.0


class PartitionTransaction(Protocol):
    """One input partition's transactional producer. Bars go out inside the open
    transaction; ``commit`` adds the checkpoint and the next input offset and commits
    them all together."""

    async def begin(self) -> None: ...

    async def commit(self, checkpoint: bytes, offset: int) -> None: ...

    async def abort(self) -> None: ...

    async def stop(self) -> None: ...


class CheckpointBus(Protocol):
    """Where exactly-once delivery keeps checkpoints: one transaction per input
    partition (``open`` fences the partition's earlier owner), and the latest
    committed checkpoint per stream (``load``)."""

    async def start(self) -> None: ...

    async def open(self, stream: str, topic: str, partition: int) -> PartitionTransaction: ...

    async def load(self, streams: Sequence[str]) -> dict[str, bytes]: ...

    async def close(self) -> None: ...


class KafkaTransaction:
    """One input partition's transactional producer, started (earlier owners fenced)."""

    def __init__(self, bus: KafkaCheckpointBus, stream: str, topic: str, partition: int, producer: Any) -> None:
        self.stream = stream
        self.producer = producer
        self._bus = bus
        self._topic = topic
        self._partition = partition

    async def begin(self) -> None:
        await self.producer.begin_transaction()

    async def commit(self, checkpoint: bytes, offset: int) -> None:
        """The checkpoint to the state topic and ``offset`` to the group, then commit
        (with the bars already sent in this transaction)."""
        from aiokafka.structs import TopicPartition

        bus = self._bus
        key = self.stream.encode("utf-8")
        await self.producer.send(bus.topic, value=checkpoint, key=key, partition=bus.partition_of(self.stream))
        await self.producer.send_offsets_to_transaction(
            {TopicPartition(self._topic, self._partition): offset}, bus.group_id
        )
        await self.producer.commit_transaction()

    async def abort(self) -> None:
        await asyncio.wait_for(self.producer.abort_transaction(), _ABORT_TIMEOUT_S)

    async def stop(self) -> None:
        self._bus.forget(self)
        await stop_client(self.producer)


class KafkaCheckpointBus:
    """The :class:`CheckpointBus` on Kafka: the state topic and the partitions'
    transactional producers."""

    def __init__(self, settings: Settings) -> None:
        self._kafka = settings.kafka
        self.group_id = settings.kafka.group_id
        self.topic = settings.state_topic
        self.partitions = 1
        self._reader: Any = None
        self._open: dict[str, KafkaTransaction] = {}

    async def start(self) -> None:
        kafka = self._kafka
        self.partitions = await ensure_topic(kafka, self.topic, kafka.state_partitions, STATE_TOPIC_CONFIGS)
        reader = new_consumer(
            kafka,
            f"{kafka.client_id}-state",
            max_partition_fetch_bytes=16 * 1024 * 1024,
            fetch_max_bytes=64 * 1024 * 1024,
        )
        await start_client(reader, kafka, "state topic reader")
        self._reader = reader

    async def close(self) -> None:
        if self._reader is not None:
            await self._reader.stop()
            self._reader = None

    def partition_of(self, stream: str) -> int:
        return partition_for(stream, self.partitions)

    async def open(self, stream: str, topic: str, partition: int) -> KafkaTransaction:
        """Start ``stream``'s transactional producer; this fences the partition's earlier owner."""
        kafka = self._kafka
        producer = bar_producer(
            kafka,
            f"{kafka.client_id}-{topic}-{partition}",
            transactional_id=f"{kafka.group_id}.{topic}.{partition}",
            transaction_timeout_ms=kafka.transaction_timeout_ms,
        )
        await start_client(producer, kafka, f"transactional producer of {stream}", SinkError)
        transaction = self._open[stream] = KafkaTransaction(self, stream, topic, partition, producer)
        return transaction

    def forget(self, transaction: KafkaTransaction) -> None:
        if self._open.get(transaction.stream) is transaction:
            del self._open[transaction.stream]

    def producer_for(self, stream: str) -> Any:
        """The producer of ``stream``'s open transaction (the bus sink sends bars with it)."""
        transaction = self._open.get(stream)
        if transaction is None:
            raise StateError(f"partition {stream} has no open transaction here")
        return transaction.producer

    async def load(self, streams: Sequence[str]) -> dict[str, bytes]:
        """The latest committed checkpoint of each of ``streams`` that has one."""
        from aiokafka.structs import TopicPartition

        wanted = set(streams)
        tps = sorted({TopicPartition(self.topic, self.partition_of(s)) for s in streams})
        if not tps:
            return {}
        reader = self._reader
        reader.assign(tps)
        await reader.seek_to_beginning(*tps)
        # For a read_committed reader the end is the last stable offset: open
        # transactions of earlier owners were aborted when our producers started.
        ends = await reader.end_offsets(tps)
        latest: dict[str, bytes] = {}
        while True:
            behind = [tp for tp in tps if await reader.position(tp) < ends[tp]]
            if not behind:
                return latest
            polled = await reader.getmany(*behind, timeout_ms=1000)
            for records in polled.values():
                for record in records:
                    key = record.key.decode("utf-8") if record.key else ""
                    if key in wanted:
                        if record.value is None:  # a tombstone: the state was deleted on purpose
                            latest.pop(key, None)
                        else:
                            latest[key] = record.value


class MemoryCheckpointBus:
    """A test double of :class:`CheckpointBus`. A commit stores the checkpoint in
    ``checkpoints`` (stream → latest) and the offset in ``group_offsets`` (stream →
    next offset: the consumer group's, which an in-memory source reads), together.
    ``fail_next(stream, exc)`` makes the stream's next commit raise ``exc``; with
    ``landed=True`` the commit lands first (a commit that timed out on the client after
    the broker took it), and ``on_landed(stream)``, when set, is awaited then: what the
    transaction wrote becomes visible, as on the broker;
    ``fence(stream)`` plays another producer taking the stream's transactional id;
    ``after_commit``, when set, is called after every commit (a test's kill switch that
    acts at a commit, not at whatever moment a polling test wakes up); ``before_commit``,
    when set, is awaited at the start of every commit (a broker's round trip, as long as
    a test likes)."""

    def __init__(self, group_offsets: dict[str, int] | None = None) -> None:
        self.checkpoints: dict[str, bytes] = {}
        self.group_offsets: dict[str, int] = group_offsets if group_offsets is not None else {}
        self.commits: list[tuple[str, int]] = []  # (stream, offset) per committed transaction
        self._failures: dict[str, list[tuple[BaseException, bool]]] = {}
        self._open: dict[str, _MemoryTransaction] = {}
        self.on_landed: Callable[[str], Awaitable[None]] | None = None
        self.after_commit: Callable[[], None] | None = None
        self.before_commit: Callable[[str], Awaitable[None]] | None = None

    async def start(self) -> None:
        return None

    async def close(self) -> None:
        return None

    async def open(self, stream: str, topic: str, partition: int) -> PartitionTransaction:
        self.fence(stream)  # as on Kafka: the new producer fences the partition's earlier one
        transaction = self._open[stream] = _MemoryTransaction(self, stream)
        return transaction

    async def load(self, streams: Sequence[str]) -> dict[str, bytes]:
        return {stream: self.checkpoints[stream] for stream in streams if stream in self.checkpoints}

    def fail_next(self, stream: str, exc: BaseException, landed: bool = False) -> None:
        self._failures.setdefault(stream, []).append((exc, landed))

    def fence(self, stream: str) -> None:
        transaction = self._open.pop(stream, None)
        if transaction is not None:
            transaction.fenced = True


class _MemoryTransaction:
    def __init__(self, bus: MemoryCheckpointBus, stream: str) -> None:
        self.fenced = False
        self._bus = bus
        self._stream = stream

    def _check(self) -> None:
        if self.fenced:
            from aiokafka.errors import ProducerFenced

            raise ProducerFenced()

    async def begin(self) -> None:
        self._check()

    async def commit(self, checkpoint: bytes, offset: int) -> None:
        self._check()
        if self._bus.before_commit is not None:
            await self._bus.before_commit(self._stream)
            self._check()
        bus = self._bus
        failures = bus._failures.get(self._stream)
        if failures:
            exc, landed = failures.pop(0)
            if landed:
                self._land(checkpoint, offset)
                if bus.on_landed is not None:
                    await bus.on_landed(self._stream)
            raise exc
        self._land(checkpoint, offset)
        if bus.after_commit is not None:
            bus.after_commit()

    def _land(self, checkpoint: bytes, offset: int) -> None:
        self._bus.checkpoints[self._stream] = checkpoint
        self._bus.group_offsets[self._stream] = offset
        self._bus.commits.append((self._stream, offset))

    async def abort(self) -> None:
        self._check()

    async def stop(self) -> None:
        if self._bus._open.get(self._stream) is self:
            del self._bus._open[self._stream]
