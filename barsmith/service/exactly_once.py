"""Exactly-once delivery: per input partition, bars, checkpoint and offsets in one transaction.

Every assigned input partition has an *owner* here: a transactional producer whose
``transactional_id`` is ``<group>.<topic>.<partition>`` (starting it fences any
earlier owner of the partition and aborts that owner's open transaction), the last
committed checkpoint, and a health flag. A checkpoint, per partition, every
``checkpoint.interval_s`` or ``checkpoint.every_messages`` (and on revocation and
shutdown), is one transaction:

    bars since the last checkpoint (already sent inside the open transaction)
    + the engine's checkpoint → the compacted state topic, key = stream name
    + the next input offset → the consumer group (``send_offsets_to_transaction``)
    → commit; then the checkpointed sinks publish what they staged (Parquet parts).

On assignment the owner reads the partition's latest checkpoint, restores the engine
and the sinks' staged state, and seeks the consumer to the checkpoint's offset. When
a transaction fails (broker gone, timeout), the owner aborts it and *rewinds*:
restores the last committed checkpoint and seeks back, so the bars of the aborted
transaction are built again from the same input. A fenced owner (another producer
took the partition's transactional id) stops touching the partition and waits for
the revocation; if the group still assigns the partition to this process two
session timeouts later (the fencer was a zombie, or the broker aborted a transaction
that outlived ``transaction_timeout_ms``), it takes the partition back from its
checkpoint.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.errors import SinkError
from barsmith.settings import Settings
from barsmith.sinks.base import CheckpointedSink
from barsmith.sources.kafka import security_kwargs
from barsmith.sources.partitioning import partition_for

if TYPE_CHECKING:
    from barsmith.service.daemon import ServiceRunner

log = logging.getLogger("barsmith.checkpoint")

# The state topic keeps the latest checkpoint per key; small segments let the
# log cleaner drop superseded checkpoints soon, so a restore reads little.
STATE_TOPIC_CONFIGS = {
    "cleanup.policy": "compact",
    "segment.ms": "600000",
    "segment.bytes": str(64 * 1024 * 1024),
    "min.cleanable.dirty.ratio": "0.1",
}
_ABORT_TIMEOUT_S = 10.0


def _caused_by(exc: BaseException, kinds: type[BaseException] | tuple[type[BaseException], ...]) -> bool:
    """Whether ``exc`` or an exception it was raised from is one of ``kinds``."""
    seen: BaseException | None = exc
    while seen is not None:
        if isinstance(seen, kinds):
            return True
        seen = seen.__cause__
    return False


def is_bus_failure(exc: BaseException) -> bool:
    """A failure of the broker or the transaction (worth a rewind), not of our own code."""
    from aiokafka.errors import KafkaError

    return _caused_by(exc, (KafkaError, asyncio.TimeoutError, ConnectionError))


def _is_fenced(exc: BaseException) -> bool:
    from aiokafka.errors import ProducerFenced

    return _caused_by(exc, ProducerFenced)


class StateTopic:
    """The compacted topic holding each input partition's latest checkpoint."""

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.topic = settings.state_topic
        self.partitions = 1
        self._reader: Any = None

    async def start(self) -> None:
        from aiokafka import AIOKafkaConsumer

        from barsmith.tools.bus import ensure_topic

        kafka = self.settings.kafka
        self.partitions = await ensure_topic(kafka, self.topic, kafka.state_partitions, STATE_TOPIC_CONFIGS)
        self._reader = AIOKafkaConsumer(
            bootstrap_servers=kafka.bootstrap_servers,
            client_id=f"{kafka.client_id}-state",
            enable_auto_commit=False,
            isolation_level="read_committed",
            max_partition_fetch_bytes=16 * 1024 * 1024,
            fetch_max_bytes=64 * 1024 * 1024,
            **security_kwargs(kafka),
        )
        await self._reader.start()

    def partition_of(self, stream: str) -> int:
        return partition_for(stream, self.partitions)

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

    async def close(self) -> None:
        if self._reader is not None:
            await self._reader.stop()
            self._reader = None


class PartitionOwner:
    """This process's hold on one input partition."""

    __slots__ = (
        "checkpoint",
        "dirty",
        "epoch",
        "fenced",
        "fenced_at",
        "healthy",
        "last_at",
        "loaded",
        "offset",
        "partition",
        "producer",
        "records_at",
        "restores",
        "sink_states",
        "stream",
        "topic",
    )

    def __init__(self, stream: str, topic: str, partition: int, producer: Any) -> None:
        self.stream = stream
        self.topic = topic
        self.partition = partition
        self.producer = producer
        self.checkpoint: bytes | None = None  # the last committed checkpoint
        self.offset: int | None = None  # its input offset (None: the partition's beginning)
        self.sink_states: dict[str, Any] = {}
        self.epoch = 0
        self.last_at = time.monotonic()
        self.records_at = 0
        self.dirty = False  # something went into the open transaction since the checkpoint
        self.healthy = False  # False: the open transaction failed; recover before more input
        self.fenced = False  # another producer took the transactional id
        self.fenced_at = 0.0
        self.loaded = False  # the stored checkpoint has been read
        self.restores = 0  # how often state was (re)installed: a checkpoint in flight is then void


class ExactlyOnce:
    """The owners of this process's partitions and their checkpoints (see module doc)."""

    def __init__(self, runner: ServiceRunner, sinks: Sequence[CheckpointedSink]) -> None:
        self.runner = runner
        self.settings = runner.settings
        self.sinks = tuple(sinks)
        self.state = StateTopic(runner.settings)
        self.owners: dict[str, PartitionOwner] = {}
        self.metrics = runner.metrics

    async def start(self) -> None:
        await self.state.start()

    async def close(self) -> None:
        owners, self.owners = list(self.owners.values()), {}
        await asyncio.gather(*(self._stop_producer(owner.producer) for owner in owners))
        await self.state.close()

    def producer_for(self, stream: str) -> Any:
        return self.owners[stream].producer

    def accepts(self, stream: str) -> bool:
        """Whether input of ``stream`` may be processed now."""
        owner = self.owners.get(stream)
        return owner is not None and owner.healthy

    # -- assignment and revocation ----------------------------------------------------

    async def assign(self, streams: Sequence[str]) -> None:
        """Take over ``streams``: fence earlier owners, restore checkpoints, seek."""
        source = self.runner.kafka_source
        new = [s for s in streams if s not in self.owners]
        for stream in new:
            part = source.partitions[stream]
            self.owners[stream] = PartitionOwner(stream, part.topic, part.partition, None)
        # Start all producers first (in parallel): that fences the earlier owners and
        # aborts their open transactions, so the state topic is stable when read.
        results = await asyncio.gather(*(self._start_producer(self.owners[s]) for s in new), return_exceptions=True)
        for stream, result in zip(new, results, strict=True):
            if isinstance(result, BaseException):
                log.warning("%s: cannot start its producer yet (%s); retrying", stream, result)
            else:
                self.owners[stream].producer = result
        ready = [s for s in new if self.owners[s].producer is not None]
        try:
            stored = await self.state.load(ready)
        except Exception as exc:
            if not is_bus_failure(exc):
                raise
            log.warning("cannot read checkpoints yet (%s); retrying", exc)
            return
        for stream in ready:
            owner = self.owners[stream]
            group_offset = await self._adopt(owner, stored.get(stream))
            try:
                await self._restore(owner, "assignment", group_offset)
            except Exception as exc:
                if not is_bus_failure(exc):
                    raise
                log.warning("%s: cannot restore yet (%s); retrying", stream, exc)

    async def _adopt(self, owner: PartitionOwner, data: bytes | None) -> int | None:
        """Take ``data`` (the partition's stored checkpoint, if any) as the owner's last;
        returns the consumer group's committed offset of the partition."""
        committed = await self.runner.kafka_source.committed_offset(owner.stream)
        if data is None:
            if committed is not None:
                log.warning(
                    "no checkpoint for %s, but the group committed offset %d (an at-least-once run?): "
                    "continuing there with empty state; bars spanning that point are partial",
                    owner.stream,
                    committed,
                )
            owner.offset = committed
        owner.checkpoint = data
        owner.loaded = True
        return committed

    async def revoke(self, streams: Sequence[str]) -> None:
        """Let go of ``streams``: checkpoint and commit what they did, then forget them."""
        mine = [s for s in streams if s in self.owners]
        await asyncio.gather(*(self.checkpoint(s, final=True) for s in mine if self.owners[s].healthy))
        for stream in mine:
            for sink in self.sinks:
                sink.release(stream)
        await asyncio.gather(*(self._stop_producer(self.owners.pop(s).producer) for s in mine))

    # -- checkpoints --------------------------------------------------------------------

    async def after_batch(self, stream: str) -> None:
        owner = self.owners.get(stream)
        engine = self.runner.engines.get(stream)
        if owner is None or engine is None or not owner.healthy:
            return
        owner.dirty = True
        if engine.stats.records - owner.records_at >= self.settings.checkpoint.every_messages:
            await self.checkpoint(stream)

    async def housekeeping(self, now: float) -> None:
        """Checkpoint partitions that are due; retry the recovery of failed ones."""
        interval = self.settings.checkpoint.interval_s
        due = []
        grace_s = 2 * self.settings.kafka.session_timeout_ms / 1000
        for stream, owner in list(self.owners.items()):  # the caller holds the engine lock
            if owner.fenced:
                if now - owner.fenced_at >= grace_s:
                    log.warning("%s: still assigned here %.0f s after being fenced: taking it back", stream, grace_s)
                    owner.fenced = False
                    await self._stop_producer(owner.producer)
                    owner.producer = None
                    await self._recover(owner)
                continue
            if not owner.healthy:
                await self._recover(owner)  # a bus failure is logged and retried next time
            elif now - owner.last_at >= interval:
                due.append(stream)
        # Partitions are independent (own producer, engine, sink buffers): their
        # transactions' round trips overlap instead of adding up.
        await asyncio.gather(*(self.checkpoint(stream) for stream in due))

    async def checkpoint_all(self, final: bool) -> None:
        streams = [stream for stream, owner in self.owners.items() if owner.healthy]
        await asyncio.gather(*(self.checkpoint(stream, final=final) for stream in streams))

    async def checkpoint(self, stream: str, final: bool = False) -> bool:
        """Commit ``stream``'s bars, checkpoint and offset in one transaction.
        Returns whether it committed (False: nothing new, or it failed and rewound)."""
        owner = self.owners[stream]
        engine = self.runner.engines[stream]
        part = self.runner.kafka_source.partitions.get(stream)
        offset = part.next_offset if part is not None and part.next_offset is not None else owner.offset
        owner.last_at = time.monotonic()
        # Nothing new since the last checkpoint: skip, except on the way out, where
        # the final checkpoint also writes what the sinks still carry.
        if offset is None or (offset == owner.offset and not owner.dirty and not final):
            return False
        from aiokafka.structs import TopicPartition

        started = time.perf_counter()
        restores = owner.restores
        try:
            await self.runner.deliver(stream, engine)
            if not owner.healthy or owner.restores != restores:  # delivery failed: the stream rewound
                return False
            sink_states = {sink.name: await sink.prepare(stream, offset, final) for sink in self.sinks}
            meta = {"offset": offset, "sinks": sink_states, "epoch": owner.epoch + 1, "written_ns": time.time_ns()}
            data = encode_checkpoint(engine, meta)
            producer = owner.producer
            await producer.send(
                self.state.topic, value=data, key=stream.encode("utf-8"), partition=self.state.partition_of(stream)
            )
            await producer.send_offsets_to_transaction(
                {TopicPartition(owner.topic, owner.partition): offset}, self.settings.kafka.group_id
            )
            await producer.commit_transaction()
        except Exception as exc:
            if not is_bus_failure(exc):
                raise
            await self.fail(stream, exc)
            return False
        self.metrics.transactions.labels(outcome="committed").inc()
        self.metrics.checkpoint_bytes.observe(len(data))
        self.metrics.checkpoint_seconds.observe(time.perf_counter() - started)
        owner.checkpoint, owner.offset, owner.sink_states = data, offset, sink_states
        owner.epoch += 1
        owner.records_at = engine.stats.records
        owner.dirty = False
        for sink in self.sinks:
            await sink.committed(stream, sink_states[sink.name])
        if not final:
            await owner.producer.begin_transaction()
        return True

    async def fail(self, stream: str, exc: BaseException) -> None:
        """The open transaction of ``stream`` failed: abort it and rewind to the checkpoint."""
        owner = self.owners[stream]
        owner.healthy = False
        self.runner.kafka_source.pause(stream)  # no point fetching what the rewind re-reads
        self.metrics.transactions.labels(outcome="aborted").inc()
        if _is_fenced(exc):
            owner.fenced, owner.fenced_at = True, time.monotonic()
            log.error("%s: another producer took this partition's transactional id (fenced); standing back", stream)
            return
        log.warning(
            "%s: transaction failed (%s: %s); rewinding to the checkpoint at offset %s",
            stream,
            type(exc).__name__,
            exc,
            owner.offset,
        )
        try:
            await asyncio.wait_for(owner.producer.abort_transaction(), _ABORT_TIMEOUT_S)
        except Exception:
            # The producer cannot abort (fatal state or no broker): replace it. Starting
            # a producer with the same transactional id aborts the transaction for us.
            await self._stop_producer(owner.producer)
            owner.producer = None
        await self._recover(owner)  # a bus failure is logged and retried by housekeeping

    async def _recover(self, owner: PartitionOwner) -> None:
        try:
            if owner.producer is None:
                owner.producer = await self._start_producer(owner)
            reason, group_offset = "rewind", None
            if not owner.loaded:
                group_offset = await self._adopt(owner, (await self.state.load([owner.stream])).get(owner.stream))
                reason = "assignment"
            await self._restore(owner, reason, group_offset)
        except Exception as exc:
            if not is_bus_failure(exc):
                raise
            log.warning("%s: cannot recover yet (%s); retrying", owner.stream, exc)

    async def _restore(self, owner: PartitionOwner, reason: str, group_offset: int | None = None) -> None:
        """Install the owner's last committed checkpoint (or empty state) and seek to it.
        ``group_offset``: on assignment, the group's committed offset (for the count of
        records consumed again)."""
        runner = self.runner
        source = runner.kafka_source
        stream = owner.stream
        part = source.partitions[stream]
        position = part.next_offset
        if owner.checkpoint is not None:
            engine, meta = decode_checkpoint(owner.checkpoint, runner.specs, runner.lateness_ns)
            owner.offset = int(meta["offset"])
            owner.sink_states = dict(meta.get("sinks", {}))
            owner.epoch = int(meta.get("epoch", 0))
        else:
            engine = Engine(runner.specs, runner.lateness_ns)
            owner.sink_states = {}
        for sink in self.sinks:
            await sink.restore(stream, owner.sink_states.get(sink.name), owner.offset or 0)
        if reason == "assignment":
            runner.set_baseline(stream, engine.stats)
        runner.engines[stream] = engine
        await source.seek(stream, owner.offset)
        source.resume(stream)
        owner.records_at = engine.stats.records
        owner.dirty = False
        owner.last_at = time.monotonic()
        owner.restores += 1
        await owner.producer.begin_transaction()
        owner.healthy = True
        self.metrics.restores.labels(reason=reason).inc()
        done = position if reason == "rewind" else group_offset
        rewound = max(0, (done or 0) - (owner.offset or 0))
        self.metrics.offsets_rewound.inc(rewound)
        # No end-offset lookup for the log line: at the end of a partition it queues
        # behind the consumer's long-poll fetch (up to fetch_max_wait_ms, 0.5 s) on the
        # same connection, and eight of those in one assignment callback outlasted the
        # session timeout, so the group kept evicting the member (a rebalance loop).
        where = f"offset {owner.offset:,}" if owner.offset is not None else "the beginning"
        origin = f"its checkpoint (epoch {owner.epoch})" if owner.checkpoint is not None else "empty state"
        log.info(
            "%s: restored from %s on %s at %s: %d books, %d open bars; %d records rewound",
            stream,
            origin,
            reason,
            where,
            engine.symbols,
            engine.open_bar_count(),
            rewound,
        )

    # -- producers ------------------------------------------------------------------------

    async def _start_producer(self, owner: PartitionOwner) -> Any:
        from aiokafka import AIOKafkaProducer
        from aiokafka.errors import KafkaError

        kafka = self.settings.kafka
        compression = None if kafka.output_compression == "none" else kafka.output_compression
        producer = AIOKafkaProducer(
            bootstrap_servers=kafka.bootstrap_servers,
            client_id=f"{kafka.client_id}-{owner.topic}-{owner.partition}",
            transactional_id=f"{kafka.group_id}.{owner.topic}.{owner.partition}",
            transaction_timeout_ms=kafka.transaction_timeout_ms,
            enable_idempotence=True,
            acks="all",
            compression_type=compression,
            linger_ms=kafka.output_linger_ms,
            **security_kwargs(kafka),
        )
        try:
            await producer.start()  # init_transactions: fences the partition's previous owner
        except KafkaError as exc:
            await self._stop_producer(producer)
            raise SinkError(f"cannot start the transactional producer for {owner.stream}: {exc}") from exc
        return producer

    async def _stop_producer(self, producer: Any) -> None:
        if producer is None:
            return
        with contextlib.suppress(Exception):
            await asyncio.wait_for(producer.stop(), _ABORT_TIMEOUT_S)
