"""``barsmith publish`` and ``barsmith record``: recorded feeds to and from a topic."""

from __future__ import annotations

import asyncio
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import msgpack

from barsmith.bus.clients import new_consumer, new_producer, start_client
from barsmith.bus.topics import ensure_topic, partition_for, symbol_of, topic_partitions
from barsmith.errors import ConfigError
from barsmith.ingest.framed import FramedWriter
from barsmith.ingest.ticks import Tick
from barsmith.settings import KafkaSettings
from barsmith.sources.files import FileSource


@dataclass(slots=True)
class PublishSummary:
    records: int = 0  # Kafka records sent
    ticks: int = 0  # tick candidates inside them
    skipped: int = 0  # spans of the file that were not msgpack (not publishable)
    seconds: float = 0.0
    shift_ns: int = 0  # added to every event time (shift_to_now)


async def publish_feed(
    files: list[Path],
    kafka: KafkaSettings,
    topic: str,
    partitions: int = 8,
    speed: float | None = None,
    batch_ticks: int = 1,
    *,
    shift_to_now: bool = False,
) -> PublishSummary:
    """Publish recorded files to ``topic``, keyed by symbol.

    ``speed``: None = as fast as possible; 1.0 = real time (event-time gaps become
    wall-time waits); 10.0 = ten times faster. ``batch_ticks > 1`` sends arrays of up
    to that many consecutive ticks of one partition per record. ``shift_to_now`` adds
    one offset to every tick's ``ts`` so that the first tick is stamped with the wall
    clock when it is sent: the spacing of the feed is kept, so at ``speed=1`` every
    tick is stamped about when it is sent, as live data is (the idle rule and the
    delay metrics then mean something); unpaced, the feed's later ticks lie in the
    future.
    """
    count = await ensure_topic(kafka, topic, partitions)
    producer = new_producer(kafka, f"{kafka.client_id}-publish", linger_ms=20, max_batch_size=256 * 1024)
    await start_client(producer, kafka, "publisher")
    summary = PublishSummary()
    started = time.perf_counter()
    pending: dict[int, list[Any]] = {}
    packb = msgpack.Packer(use_bin_type=True).pack
    first_ts: int | None = None
    wall0 = time.monotonic()

    shift: int | None = None if shift_to_now else 0  # known at the first tick with a ts

    async def send(partition: int, value: Any, key: str | None) -> None:
        value = as_wire(value)
        if shift:
            value = shifted(value, shift)
        await producer.send(topic, value=packb(value), key=key.encode("utf-8") if key else None, partition=partition)
        summary.records += 1

    try:
        source = FileSource(files)
        async for batch in source.batches():
            summary.skipped += len(batch.rejects)
            for record in batch.records:
                summary.ticks += len(record) if type(record) is list else 1
                if shift is None:
                    first = _event_time(record)
                    if first is not None:
                        shift = summary.shift_ns = time.time_ns() - first
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


def shifted(wire: Any, shift_ns: int) -> Any:
    """Wire map(s) with ``shift_ns`` added to every integer ``ts`` (other values as they are)."""
    if type(wire) is list:
        return [shifted(item, shift_ns) for item in wire]
    if type(wire) is dict:
        ts = wire.get("ts")
        if type(ts) is int and ts + shift_ns > 0:
            return {**wire, "ts": ts + shift_ns}
    return wire


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
    from aiokafka.structs import TopicPartition

    count = await topic_partitions(kafka, topic)
    if count is None:
        raise ConfigError(f"topic {topic!r} does not exist")
    consumer = new_consumer(kafka, f"{kafka.client_id}-record")
    await start_client(consumer, kafka, "recorder")
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
