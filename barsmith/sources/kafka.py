"""Kafka source: a consumer group member yielding one ordered stream per partition.

A record's value is one tick map or a msgpack array of tick maps. The value's ``sym``
decides each tick's symbol; the key only chose the partition. A record whose key is
none of its ticks' symbols is still used as its value says, and counted
(:class:`KeyMismatches`: a metric, and a log line per partition at most every
minute). Each partition is processed in order by its own engine
(stream name ``topic[partition]``). Offsets are committed by the delivery strategy,
after the sinks have flushed what those records produced, or with the checkpoints.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Callable
from typing import Any

import msgpack

from barsmith.bus.clients import new_consumer, start_client
from barsmith.bus.topics import stream_name
from barsmith.errors import StateError, describe_error
from barsmith.ingest.fastwire import new_scanner
from barsmith.ingest.framing import DEFAULT_MAX_RECORD_BYTES, MAX_KEPT_BYTES, new_unpacker, unpack_value
from barsmith.ingest.rejects import Reject
from barsmith.ingest.ticks import RejectReason, Tick
from barsmith.settings import KafkaSettings
from barsmith.sources.base import (
    PartitionListener,
    PartitionPosition,
    RecordBatch,
    current_position,
    uncommitted,
)

log = logging.getLogger("barsmith.kafka")

_DECODE_ERRORS = (msgpack.exceptions.UnpackException, ValueError, TypeError)


def decode_value(value: bytes | None, unpacker_factory: Callable[[], msgpack.Unpacker] = new_unpacker) -> Any:
    """One record value → a decoded object; raises ValueError when it is not one msgpack value."""
    if value is None:
        raise ValueError("empty record value")
    unpacker = unpacker_factory()
    unpacker.feed(value)
    try:
        obj = unpacker.unpack()
    except msgpack.exceptions.OutOfData:
        raise ValueError(f"record value is cut short ({len(value)} bytes)") from None
    except _DECODE_ERRORS as exc:
        raise ValueError(describe_error(exc)) from None
    if unpacker.tell() != len(value):
        raise ValueError(f"{len(value) - unpacker.tell()} bytes after the first msgpack value")
    return obj


class KeyMismatches:
    """Counts records whose key is none of their ticks' symbols, by stream. The value's
    ``sym`` decides the symbol — the key only placed the record on its partition, so a
    mismatch is a producer's mistake worth seeing (the symbol's ticks may be split
    across partitions), not a reason to drop data. Logged per stream: the first one at
    once, then at most one line every ``log_every_s`` with the count since the last."""

    def __init__(self, log_every_s: float = 60.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.counts: dict[str, int] = {}
        self._log_every_s = log_every_s
        self._clock = clock
        self._logged: dict[str, tuple[float, int]] = {}  # stream -> (when, count then)

    def check(self, stream: str, offset: int, key: bytes, value: Any) -> None:
        """Count the record at ``offset`` if ``key`` is none of ``value``'s symbols (a
        value without any symbol is the validator's business, not counted here)."""
        text = key.decode("utf-8", "replace")
        if type(value) is Tick:
            if value.sym == text:
                return  # the usual case, first
        elif type(value) is list:
            # A batch is keyed by one of its symbols, which a partition's few symbols put
            # within its first ticks: stop at the first match instead of listing every
            # tick's symbol (that cost as much per record as decoding it).
            for item in value:
                if type(item) is Tick:
                    if item.sym == text:
                        return
                elif type(item) is dict and item.get("sym") == text:
                    return
        symbols = _symbols(value)
        if not symbols or text in symbols:
            return
        count = self.counts[stream] = self.counts.get(stream, 0) + 1
        now = self._clock()
        when, before = self._logged.get(stream, (-self._log_every_s, 0))
        if now - when >= self._log_every_s:
            self._logged[stream] = (now, count)
            log.warning(
                "%s: %d record(s) keyed by something other than their symbol since the last report "
                "(offset %d: key %r, symbol %r); the value's sym decides, the key only chose the partition",
                stream,
                count - before,
                offset,
                text,
                symbols[0],
            )


def _symbols(value: Any) -> list[str]:
    """The symbols of a decoded record's ticks (a tick, a map, or a batch of them)."""
    if type(value) is Tick:
        return [value.sym]
    if type(value) is dict:
        sym = value.get("sym")
        return [sym] if type(sym) is str else []
    if type(value) is list:
        return [sym for item in value for sym in _symbols(item) if type(item) is not list]
    return []


class KafkaSource:
    """Consumes the input topics in a consumer group (a :class:`~barsmith.sources.base.LiveSource`).

    ``batches()`` yields one :class:`RecordBatch` per partition per poll, and an
    empty heartbeat batch when a poll returns nothing, so that the runner's
    housekeeping runs while input is idle. The listener given to :meth:`start` is
    told of assignments, and of revocations before the partitions are taken away.
    ``pause_on_assign`` (exactly-once): new partitions stay paused until their owner
    has restored the checkpoint and sought to it, so no record is read from the
    wrong place.
    """

    def __init__(
        self, kafka: KafkaSettings, *, pause_on_assign: bool = False, max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES
    ) -> None:
        """A record value larger than ``max_record_bytes`` is rejected as ``too_large``
        without being decoded."""
        self.settings = kafka
        self._max_record_bytes = max_record_bytes
        self.partitions: dict[str, PartitionPosition] = {}
        self.pause_on_assign = pause_on_assign
        self.started = asyncio.Event()
        self._listener: PartitionListener | None = None
        self._consumer: Any = None
        self._stopped = False
        self._scanner = new_scanner()
        self._failure: BaseException | None = None
        self._keys = KeyMismatches()
        self.key_mismatches = self._keys.counts

    def progress(self) -> tuple[int, int] | None:
        return None

    def stop(self) -> None:
        self._stopped = True

    def fail(self, exc: BaseException) -> None:
        """Stop with ``exc``: ``batches()`` raises it (for errors in rebalance callbacks,
        which run in the consumer's task)."""
        self._failure = exc
        self._stopped = True

    async def start(self, listener: PartitionListener) -> None:
        from aiokafka.abc import ConsumerRebalanceListener

        source = self
        self._listener = listener

        class _Rebalance(ConsumerRebalanceListener):  # type: ignore[misc]
            async def on_partitions_revoked(self, revoked: Any) -> None:
                names = [stream_name(tp.topic, tp.partition) for tp in revoked]
                if names:
                    await listener.on_revoked(names)
                for name in names:
                    source.partitions.pop(name, None)

            async def on_partitions_assigned(self, assigned: Any) -> None:
                if source.pause_on_assign and assigned:
                    source._consumer.pause(*assigned)  # before any await: see pause_on_assign
                for tp in assigned:
                    source.partitions.setdefault(
                        stream_name(tp.topic, tp.partition), PartitionPosition(tp.topic, tp.partition)
                    )
                await listener.on_assigned([stream_name(tp.topic, tp.partition) for tp in assigned])
                log.info("partitions assigned: %s", ", ".join(sorted(source.partitions)) or "none")

        kafka = self.settings
        consumer = new_consumer(
            kafka,
            kafka.client_id,
            group_id=kafka.group_id,
            auto_offset_reset="earliest",
            max_poll_records=kafka.fetch_max_records,
            session_timeout_ms=kafka.session_timeout_ms,
            heartbeat_interval_ms=max(1_000, kafka.session_timeout_ms // 3),
        )
        await start_client(consumer, kafka, "consumer")
        self._consumer = consumer
        consumer.subscribe(topics=kafka.input_topics, listener=_Rebalance())
        self.started.set()

    async def batches(self) -> AsyncIterator[RecordBatch]:
        consumer = self._consumer
        if consumer is None:
            raise StateError("the Kafka source was not started")
        timeout_ms = self.settings.poll_timeout_ms
        while not self._stopped:
            polled = await consumer.getmany(timeout_ms=timeout_ms, max_records=self.settings.fetch_max_records)
            if self._failure is not None:
                break
            self._refresh_highwaters()
            if not polled:
                yield RecordBatch("", "", [], [])  # heartbeat: lets housekeeping run
                continue
            now = time.monotonic()
            # What each partition looked like when these records were fetched: a
            # rebalance or a rewind while earlier partitions are processed makes the
            # rest of this poll stale for the partitions it touched.
            tokens = {tp: self._token(stream_name(tp.topic, tp.partition)) for tp in polled}
            for tp, records in polled.items():
                if not records:
                    continue
                name = stream_name(tp.topic, tp.partition)
                position = current_position(self.partitions, name, tokens[tp])
                if position is None:
                    log.debug("dropping %d stale records of %s (revoked or rewound)", len(records), name)
                    continue
                if position.next_offset is not None and records[0].offset < position.next_offset:
                    records = [r for r in records if r.offset >= position.next_offset]  # read twice
                    if not records:
                        continue
                position.last_record_wall = now
                batch = self._decode(name, records)
                # The position advances when the runner has processed the batch (see
                # current()), not here: a rebalance callback may checkpoint in between.
                batch.end_position = records[-1].offset + 1
                batch.token = tokens[tp]
                yield batch
                # Let aiokafka's fetcher run between partitions, so the next fetch
                # overlaps with processing instead of following it.
                await asyncio.sleep(0)
                if self._stopped:
                    break
        if self._failure is not None:
            raise self._failure

    def current(self, batch: RecordBatch) -> PartitionPosition | None:
        """The partition's position if ``batch`` is still valid — its partition neither
        reassigned nor sought since the batch was fetched; None for a stale batch.
        The caller sets ``next_offset = batch.end_position`` once it has processed it."""
        return current_position(self.partitions, batch.stream, batch.token)

    def _token(self, stream: str) -> tuple[PartitionPosition, int] | None:
        position = self.partitions.get(stream)
        return position.token if position is not None else None

    async def seek(self, stream: str, offset: int | None) -> None:
        from aiokafka.structs import TopicPartition

        position = self.partitions[stream]
        tp = TopicPartition(position.topic, position.partition)
        if offset is None:
            await self._consumer.seek_to_beginning(tp)
        else:
            self._consumer.seek(tp, offset)
        position.next_offset = offset
        position.generation += 1

    def pause(self, stream: str) -> None:
        """Stop fetching ``stream`` (its owner is recovering; a seek will follow)."""
        from aiokafka.structs import TopicPartition

        position = self.partitions.get(stream)
        if position is not None and self._consumer is not None:
            self._consumer.pause(TopicPartition(position.topic, position.partition))

    def resume(self, stream: str) -> None:
        """Start fetching ``stream`` (paused since its assignment)."""
        from aiokafka.structs import TopicPartition

        position = self.partitions[stream]
        self._consumer.resume(TopicPartition(position.topic, position.partition))

    async def committed_offset(self, stream: str) -> int | None:
        from aiokafka.structs import TopicPartition

        position = self.partitions[stream]
        offset: int | None = await self._consumer.committed(TopicPartition(position.topic, position.partition))
        return offset

    def _refresh_highwaters(self) -> None:
        from aiokafka.structs import TopicPartition

        for position in self.partitions.values():
            highwater = self._consumer.highwater(TopicPartition(position.topic, position.partition))
            if highwater is not None:
                position.highwater = highwater

    def _decode(self, name: str, records: list[Any]) -> RecordBatch:
        values: list[Any] = []
        positions: list[int] = []
        rejects: list[Reject] = []
        scan = self._scanner.scan_value if self._scanner is not None else None
        keys = self._keys
        max_bytes = self._max_record_bytes
        for record in records:
            value = record.value
            if value is not None and len(value) > max_bytes:
                why = f"{len(value):,} bytes, above max_record_bytes {max_bytes:,}"
                rejects.append(Reject(name, record.offset, RejectReason.TOO_LARGE, why, bytes(value[:MAX_KEPT_BYTES])))
                continue
            decoded: Any
            # Usual shapes are decoded straight into ticks (see barsmith.ingest.fastwire).
            ticks = scan(value) if scan is not None and value is not None else None
            if ticks is not None:
                decoded = ticks
            else:
                try:
                    # The general way; the checked decoder below explains failures precisely.
                    decoded = unpack_value(value)
                except Exception:
                    try:
                        decoded = decode_value(record.value)
                    except ValueError as exc:
                        rejects.append(
                            Reject(name, record.offset, RejectReason.NOT_MSGPACK, str(exc), bytes(record.value or b""))
                        )
                        continue
            values.append(decoded)
            positions.append(record.offset)
            if record.key is not None:
                keys.check(name, record.offset, record.key, decoded)
        return RecordBatch(name, name, values, positions, rejects)

    async def commit(self, streams: list[str] | None = None) -> dict[str, int]:
        from aiokafka.structs import TopicPartition

        offsets = uncommitted(self.partitions, streams)
        if offsets and self._consumer is not None:
            positions = {stream: self.partitions[stream] for stream in offsets}
            await self._consumer.commit(
                {TopicPartition(p.topic, p.partition): offsets[stream] for stream, p in positions.items()}
            )
            for stream, position in positions.items():
                position.committed = offsets[stream]
        return offsets

    async def close(self) -> None:
        if self._consumer is not None:
            await self._consumer.stop()
            self._consumer = None
