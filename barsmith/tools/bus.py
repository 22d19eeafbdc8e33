"""``barsmith publish`` and ``barsmith record``: recorded feeds to and from a topic."""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import msgpack

from barsmith.errors import ConfigError, InputError
from barsmith.ingest.framed import FramedWriter
from barsmith.ingest.ticks import Tick
from barsmith.settings import KafkaSettings
from barsmith.sources.files import FileSource
from barsmith.sources.kafka import security_kwargs
from barsmith.sources.partitioning import partition_for, symbol_of

log = logging.getLogger("barsmith.tools")


@dataclass(slots=True)
class PublishSummary:
    records: int = 0  # Kafka records sent
    ticks: int = 0  # tick candidates inside them
    skipped: int = 0  # spans of the file that were not msgpack (not publishable)
    seconds: float = 0.0


async def _admin(kafka: KafkaSettings) -> Any:
    from aiokafka.admin import AIOKafkaAdminClient
    from aiokafka.errors import KafkaError

    admin = AIOKafkaAdminClient(bootstrap_servers=kafka.bootstrap_servers, **security_kwargs(kafka))
    try:
        await admin.start()
    except KafkaError as exc:
        raise InputError(f"cannot reach Kafka at {', '.join(kafka.bootstrap_servers)}: {exc}") from exc
    return admin


async def _partition_count(admin: Any, topic: str) -> int | None:
    for entry in await admin.describe_topics([topic]):
        if entry.get("topic") == topic and entry.get("error_code", 0) == 0 and entry.get("partitions"):
            return len(entry["partitions"])
    return None


async def topic_partitions(kafka: KafkaSettings, topic: str) -> int | None:
    """How many partitions ``topic`` has, or None when it does not exist."""
    admin = await _admin(kafka)
    try:
        return await _partition_count(admin, topic)
    finally:
        await admin.close()


async def ensure_topic(kafka: KafkaSettings, topic: str, partitions: int, configs: dict[str, str] | None = None) -> int:
    """Create ``topic`` with ``partitions`` partitions (and topic ``configs``) if missing;
    returns its partition count."""
    from aiokafka.admin import NewTopic
    from aiokafka.errors import TopicAlreadyExistsError

    admin = await _admin(kafka)
    try:
        found = await _partition_count(admin, topic)
        if found is not None:
            if found != partitions:
                log.warning("topic %s exists with %d partitions (not %d); using it as it is", topic, found, partitions)
            return found
        with contextlib.suppress(TopicAlreadyExistsError):  # created meanwhile by someone else
            await admin.create_topics(
                [NewTopic(topic, num_partitions=partitions, replication_factor=1, topic_configs=configs or {})]
            )
        return partitions
    finally:
        await admin.close()


async def publish_feed(
    files: list[Path],
    kafka: KafkaSettings,
    topic: str,
    partitions: int = 8,
    speed: float | None = None,
    batch_ticks: int = 1,
) -> PublishSummary:
    """Publish recorded files to ``topic``, keyed by symbol.

    ``speed``: None = as fast as possible; 1.0 = real time (event-time gaps become
    wall-time waits); 10.0 = ten times faster. ``batch_ticks > 1`` sends arrays of up
    to that many consecutive ticks of one partition per record.
    """
    from aiokafka import AIOKafkaProducer

    count = await ensure_topic(kafka, topic, partitions)
    producer = AIOKafkaProducer(
        bootstrap_servers=kafka.bootstrap_servers,
        client_id=f"{kafka.client_id}-publish",
        enable_idempotence=True,
        linger_ms=20,
        max_batch_size=256 * 1024,
        **security_kwargs(kafka),
    )
    await producer.start()
    summary = PublishSummary()
    started = time.perf_counter()
    pending: dict[int, list[Any]] = {}
    packb = msgpack.Packer(use_bin_type=True).pack
    first_ts: int | None = None
    wall0 = time.monotonic()

    async def send(partition: int, value: Any, key: str | None) -> None:
        value = as_wire(value)
        await producer.send(topic, value=packb(value), key=key.encode("utf-8") if key else None, partition=partition)
        summary.records += 1

    try:
        source = FileSource(files)
        async for batch in source.batches():
            summary.skipped += len(batch.rejects)
            for record in batch.records:
                summary.ticks += len(record) if type(record) is list else 1
                if speed is not None:
                    ts = _event_time(record)
                    if ts is not None:
                        if first_ts is None:
                            first_ts = ts
                        due = wall0 + (ts - first_ts) / 1e9 / speed
                        delay = due - time.monotonic()
                        if delay > 0.001:
                            await asyncio.sleep(delay)
                sym = symbol_of(record)
                partition = partition_for(sym, count)
                if batch_ticks <= 1:
                    await send(partition, record, sym)
                    continue
                items = pending.setdefault(partition, [])
                items.extend(record if type(record) is list else [record])
                if len(items) >= batch_ticks:
                    await send(partition, items, sym)
                    pending[partition] = []
        for partition, items in pending.items():
            if items:
                await send(partition, items, symbol_of(items))
        await producer.flush()
    finally:
        await producer.stop()
    summary.seconds = time.perf_counter() - started
    return summary


def as_wire(record: Any) -> Any:
    """A record as the wire map(s) to publish (decoded ticks are re-encoded as maps)."""
    if type(record) is Tick:
        return record.to_wire()
    if type(record) is list:
        return [as_wire(item) for item in record]
    return record


def _event_time(record: Any) -> int | None:
    item = record[0] if type(record) is list and record else record
    if type(item) is Tick:
        return item.ts
    if type(item) is dict:
        ts = item.get("ts")
        return ts if type(ts) is int else None
    return None


async def record_topic(kafka: KafkaSettings, topic: str, out: Path, idle_s: float = 5.0, plain: bool = False) -> int:
    """Capture ``topic`` from its beginning to the end offsets seen at start (or until
    ``idle_s`` passes with nothing new) into a replayable file; returns the record count.
    Partitions are interleaved in the order fetched; each partition stays in order.

    The file is a framed recording (:mod:`barsmith.ingest.framed`: checksummed blocks,
    so that damage is found and bounded to its block), or with ``plain`` a bare
    concatenation of the record values."""
    from aiokafka import AIOKafkaConsumer
    from aiokafka.structs import TopicPartition

    consumer = AIOKafkaConsumer(
        bootstrap_servers=kafka.bootstrap_servers,
        enable_auto_commit=False,
        isolation_level="read_committed",
        **security_kwargs(kafka),
    )
    count = await topic_partitions(kafka, topic)
    if count is None:
        raise ConfigError(f"topic {topic!r} does not exist")
    await consumer.start()
    written = 0
    try:
        tps = [TopicPartition(topic, p) for p in range(count)]
        consumer.assign(tps)
        await consumer.seek_to_beginning(*tps)
        ends = await consumer.end_offsets(tps)
        last_data = time.monotonic()
        gzip_out = out.suffix == ".gz"
        import gzip

        with gzip.open(out, "wb") if gzip_out else out.open("wb") as handle:
            framed = None if plain else FramedWriter(handle)
            while True:
                positions = [await consumer.position(tp) for tp in tps]
                done = all(pos >= ends[tp] for pos, tp in zip(positions, tps, strict=True))
                if done or time.monotonic() - last_data > idle_s:
                    break
                polled = await consumer.getmany(timeout_ms=500, max_records=10_000)
                for records in polled.values():
                    for rec in records:
                        if rec.value is not None:
                            if framed is None:
                                handle.write(rec.value)
                            else:
                                framed.write(rec.value)
                            written += 1
                    last_data = time.monotonic()
                if framed is not None:
                    framed.flush()  # a recording stopped later keeps every whole poll
    finally:
        await consumer.stop()
    return written
