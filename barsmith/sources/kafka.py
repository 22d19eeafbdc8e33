"""Kafka source: a consumer group member yielding one ordered stream per partition.

A record's value is one tick map or a msgpack array of tick maps; its key, when
present, is the symbol. Each partition is processed in order by its own engine
(stream name ``topic[partition]``). Offsets are committed by the runner, after the
sinks have flushed what those records produced.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Callable
from typing import Any

import msgpack

from barsmith.errors import ConfigError, InputError
from barsmith.ingest.fastwire import new_scanner
from barsmith.ingest.framing import DEFAULT_MAX_RECORD_BYTES, MAX_KEPT_BYTES, new_unpacker
from barsmith.ingest.rejects import Reject
from barsmith.ingest.ticks import RejectReason
from barsmith.settings import KafkaSettings
from barsmith.sources.base import RecordBatch

log = logging.getLogger("barsmith.kafka")

_DECODE_ERRORS = (msgpack.exceptions.UnpackException, ValueError, TypeError)


def stream_name(topic: str, partition: int) -> str:
    return f"{topic}[{partition}]"


def security_kwargs(kafka: KafkaSettings) -> dict[str, Any]:
    """aiokafka connection arguments for the security settings (shared by all clients)."""
    sec = kafka.security
    kwargs: dict[str, Any] = {"security_protocol": sec.protocol}
    if sec.protocol.endswith("SSL"):
        from aiokafka.helpers import create_ssl_context

        kwargs["ssl_context"] = create_ssl_context(
            cafile=str(sec.ssl_cafile) if sec.ssl_cafile else None,
            certfile=str(sec.ssl_certfile) if sec.ssl_certfile else None,
            keyfile=str(sec.ssl_keyfile) if sec.ssl_keyfile else None,
            password=sec.ssl_key_password.get_secret_value() if sec.ssl_key_password else None,
        )
    if sec.protocol.startswith("SASL"):
        kwargs["sasl_mechanism"] = sec.sasl_mechanism
        kwargs["sasl_plain_username"] = sec.sasl_username
        kwargs["sasl_plain_password"] = sec.sasl_password.get_secret_value() if sec.sasl_password else None
    return kwargs


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
        raise ValueError(f"{type(exc).__name__}: {exc}") from None
    if unpacker.tell() != len(value):
        raise ValueError(f"{len(value) - unpacker.tell()} bytes after the first msgpack value")
    return obj


class PartitionState:
    """What the runner needs to know about one assigned partition."""

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


class KafkaSource:
    """Consumes the input topics in a consumer group.

    ``batches()`` yields one :class:`RecordBatch` per partition per poll, and an
    empty heartbeat batch when a poll returns nothing, so that the runner's
    housekeeping runs while input is idle. ``on_revoked(streams)`` is called before
    partitions are taken away, so the runner can flush and commit them.
    """

    def __init__(self, kafka: KafkaSettings, max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES) -> None:
        """A record value larger than ``max_record_bytes`` is rejected as ``too_large``
        without being decoded."""
        self.settings = kafka
        self._max_record_bytes = max_record_bytes
        self.partitions: dict[str, PartitionState] = {}
        self.on_revoked: Callable[[list[str]], Any] | None = None
        self.on_assigned: Callable[[list[str]], Any] | None = None
        self._consumer: Any = None
        self._stopped = False
        self._scanner = new_scanner()
        self._failure: BaseException | None = None
        # Exactly-once: new partitions stay paused until their owner has restored the
        # checkpoint and sought to it, so no record is read from the wrong place.
        self.pause_on_assign = False
        self.started = asyncio.Event()

    @property
    def assigned(self) -> bool:
        return bool(self.partitions)

    def progress(self) -> tuple[int, int] | None:
        return None

    def stop(self) -> None:
        self._stopped = True

    def fail(self, exc: BaseException) -> None:
        """Stop with ``exc``: ``batches()`` raises it (for errors in rebalance callbacks,
        which run in the consumer's task)."""
        self._failure = exc
        self._stopped = True

    async def start(self) -> None:
        try:
            from aiokafka import AIOKafkaConsumer
            from aiokafka.abc import ConsumerRebalanceListener
            from aiokafka.errors import KafkaError
        except ImportError as exc:  # pragma: no cover - aiokafka is a dependency
            raise ConfigError("the Kafka source needs aiokafka: pip install aiokafka") from exc

        source = self

        class _Listener(ConsumerRebalanceListener):  # type: ignore[misc]
            async def on_partitions_revoked(self, revoked: Any) -> None:
                names = [stream_name(tp.topic, tp.partition) for tp in revoked]
                if names and source.on_revoked is not None:
                    await source.on_revoked(names)
                for name in names:
                    source.partitions.pop(name, None)

            async def on_partitions_assigned(self, assigned: Any) -> None:
                if source.pause_on_assign and assigned:
                    source._consumer.pause(*assigned)  # before any await: see pause_on_assign
                for tp in assigned:
                    source.partitions.setdefault(
                        stream_name(tp.topic, tp.partition), PartitionState(tp.topic, tp.partition)
                    )
                if source.on_assigned is not None:
                    await source.on_assigned([stream_name(tp.topic, tp.partition) for tp in assigned])
                log.info("partitions assigned: %s", ", ".join(sorted(source.partitions)) or "none")

        kafka = self.settings
        self._consumer = AIOKafkaConsumer(
            bootstrap_servers=kafka.bootstrap_servers,
            group_id=kafka.group_id,
            client_id=kafka.client_id,
            enable_auto_commit=False,
            auto_offset_reset="earliest",
            max_poll_records=kafka.fetch_max_records,
            isolation_level="read_committed",
            session_timeout_ms=kafka.session_timeout_ms,
            heartbeat_interval_ms=max(1_000, kafka.session_timeout_ms // 3),
            **security_kwargs(kafka),
        )
        try:
            await self._consumer.start()
        except KafkaError as exc:
            await self._consumer.stop()
            raise InputError(f"cannot reach Kafka at {', '.join(kafka.bootstrap_servers)}: {exc}") from exc
        self._consumer.subscribe(topics=kafka.input_topics, listener=_Listener())
        self.started.set()

    async def batches(self) -> AsyncIterator[RecordBatch]:
        if self._consumer is None:
            await self.start()
        consumer = self._consumer
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
                state = self._current(name, tokens[tp])
                if state is None:
                    log.debug("dropping %d stale records of %s (revoked or rewound)", len(records), name)
                    continue
                if state.next_offset is not None and records[0].offset < state.next_offset:
                    records = [r for r in records if r.offset >= state.next_offset]  # read twice
                    if not records:
                        continue
                state.last_record_wall = now
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

    def current(self, batch: RecordBatch) -> PartitionState | None:
        """The partition's state if ``batch`` is still valid — its partition neither
        reassigned nor sought since the batch was fetched; None for a stale batch.
        The caller sets ``next_offset = batch.end_position`` once it has processed it."""
        return self._current(batch.stream, batch.token)

    def _token(self, stream: str) -> tuple[PartitionState, int] | None:
        state = self.partitions.get(stream)
        return (state, state.generation) if state is not None else None

    def _current(self, stream: str, token: tuple[PartitionState, int] | None) -> PartitionState | None:
        if token is None:
            return None
        fetched, generation = token
        state = self.partitions.get(stream)
        return state if state is fetched and state.generation == generation else None

    async def seek(self, stream: str, offset: int | None) -> None:
        """Continue ``stream`` at ``offset`` (None: the partition's beginning)."""
        from aiokafka.structs import TopicPartition

        state = self.partitions[stream]
        tp = TopicPartition(state.topic, state.partition)
        if offset is None:
            await self._consumer.seek_to_beginning(tp)
        else:
            self._consumer.seek(tp, offset)
        state.next_offset = offset
        state.generation += 1

    def pause(self, stream: str) -> None:
        """Stop fetching ``stream`` (its owner is recovering; a seek will follow)."""
        from aiokafka.structs import TopicPartition

        state = self.partitions.get(stream)
        if state is not None and self._consumer is not None:
            self._consumer.pause(TopicPartition(state.topic, state.partition))

    def resume(self, stream: str) -> None:
        """Start fetching ``stream`` (paused since its assignment)."""
        from aiokafka.structs import TopicPartition

        state = self.partitions[stream]
        self._consumer.resume(TopicPartition(state.topic, state.partition))

    async def committed_offset(self, stream: str) -> int | None:
        """The consumer group's committed offset of ``stream``, if any."""
        from aiokafka.structs import TopicPartition

        state = self.partitions[stream]
        offset: int | None = await self._consumer.committed(TopicPartition(state.topic, state.partition))
        return offset

    def _refresh_highwaters(self) -> None:
        from aiokafka.structs import TopicPartition

        for state in self.partitions.values():
            highwater = self._consumer.highwater(TopicPartition(state.topic, state.partition))
            if highwater is not None:
                state.highwater = highwater

    def _decode(self, name: str, records: list[Any]) -> RecordBatch:
        values: list[Any] = []
        positions: list[int] = []
        rejects: list[Reject] = []
        unpackb = msgpack.unpackb
        scan = self._scanner.scan_value if self._scanner is not None else None
        max_bytes = self._max_record_bytes
        for record in records:
            value = record.value
            if value is not None and len(value) > max_bytes:
                why = f"{len(value):,} bytes, above max_record_bytes {max_bytes:,}"
                rejects.append(Reject(name, record.offset, RejectReason.TOO_LARGE, why, bytes(value[:MAX_KEPT_BYTES])))
                continue
            # Usual shapes are decoded straight into ticks (see barsmith.ingest.fastwire).
            if scan is not None and value is not None:
                ticks = scan(value)
                if ticks is not None:
                    values.append(ticks)
                    positions.append(record.offset)
                    continue
            try:
                # The general way; the checked decoder below explains failures precisely.
                values.append(unpackb(value, raw=False, strict_map_key=False))
                positions.append(record.offset)
            except Exception:
                try:
                    values.append(decode_value(record.value))
                    positions.append(record.offset)
                except ValueError as exc:
                    rejects.append(
                        Reject(name, record.offset, RejectReason.NOT_MSGPACK, str(exc), bytes(record.value or b""))
                    )
        return RecordBatch(name, name, values, positions, rejects)

    async def commit(self, streams: list[str] | None = None) -> dict[str, int]:
        """Commit the processed offsets of ``streams`` (default: all assigned)."""
        from aiokafka.structs import TopicPartition

        offsets = {}
        for name, state in self.partitions.items():
            if streams is not None and name not in streams:
                continue
            if state.next_offset is not None and state.next_offset != state.committed:
                offsets[TopicPartition(state.topic, state.partition)] = state.next_offset
        if offsets and self._consumer is not None:
            await self._consumer.commit(offsets)
            for tp, offset in offsets.items():
                self.partitions[stream_name(tp.topic, tp.partition)].committed = offset
        return {stream_name(tp.topic, tp.partition): off for tp, off in offsets.items()}

    async def close(self) -> None:
        if self._consumer is not None:
            await self._consumer.stop()
            self._consumer = None
