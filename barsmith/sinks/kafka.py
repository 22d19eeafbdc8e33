"""Bus sink: bars to a Kafka topic.

Key: the symbol (UTF-8). Value: a msgpack map with exactly the Parquet bar columns,
timestamps as int ns since the epoch. Header ``spec``: the bar spec. The producer
is idempotent (no duplicates from its own retries) and compresses batches.

Under exactly-once delivery the sink owns no producer: each input partition's bars
go through that partition's transactional producer (``producer_for(stream)``) and
become visible to ``read_committed`` readers when its checkpoint commits. Either
way the sink is built with its callbacks (see ``barsmith.service.app.build_service``).
"""

from __future__ import annotations

import asyncio
import functools
import logging
import time
from collections.abc import Callable, Sequence
from typing import Any

import msgpack

from barsmith.bars.record import Bar
from barsmith.bus.clients import bar_producer, start_client
from barsmith.bus.topics import ensure_topic, partition_for
from barsmith.errors import SinkError
from barsmith.settings import KafkaSettings

log = logging.getLogger("barsmith.bus")


_packer = msgpack.Packer(use_bin_type=True, autoreset=True)


def encode_bar(bar: Bar) -> bytes:
    """The bus value of a bar: a msgpack map of the bar columns."""
    return bytes(_packer.pack(bar.as_dict()))


def decode_bar(value: bytes) -> dict[str, Any]:
    """Inverse of :func:`encode_bar` (for consumers and tests)."""
    decoded: dict[str, Any] = msgpack.unpackb(value, raw=False)
    return decoded


class KafkaBarSink:
    """Publishes bars to ``topic``; ``flush()`` waits until the broker has them all.

    ``on_published(bar, delay_s)`` hears of every bar the broker acknowledged, with the
    time since it was handed over; ``producer_for(stream)`` (exactly-once) gives the
    producer of the stream's open transaction.
    """

    name = "bus"

    def __init__(
        self,
        kafka: KafkaSettings,
        topic: str,
        on_published: Callable[[Bar, float], None] | None = None,
        producer_for: Callable[[str], Any] | None = None,
        *,
        final_only: bool = False,
    ) -> None:
        self.final_only = final_only  # with a revision window: final bars only
        self._kafka = kafka
        self.topic = topic
        self._producer: Any = None
        self._inflight: set[asyncio.Future[Any]] = set()
        self._error: str | None = None
        self._on_published = on_published
        self.published = 0
        self._producer_for = producer_for
        self._stream_inflight: dict[str, set[asyncio.Future[Any]]] = {}
        self._stream_failures: dict[str, BaseException] = {}

    async def start(self) -> None:
        """Create the topic if missing (``output_partitions``); at-least-once, start the producer."""
        kafka = self._kafka
        await ensure_topic(kafka, self.topic, kafka.output_partitions)
        if self._producer_for is not None:
            return  # the partitions' transactional producers are started by their owners
        producer = bar_producer(kafka, f"{kafka.client_id}-bars")
        await start_client(producer, kafka, "bar producer", SinkError)
        self._producer = producer

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        self._raise_delivery_error()
        if self._producer_for is not None:
            producer = self._producer_for(stream)
        else:
            producer = self._producer
            if producer is None:
                raise SinkError(f"the bar producer for {self.topic} was not started")
        closed_at = time.monotonic()
        try:
            # One record batch per output partition instead of one send per bar: the
            # client's per-message path (a coroutine, a future and a partitioner call
            # each) cost more than building the bars. Partitions are the ones the
            # default partitioner picks for the key (partition_for, as publish uses),
            # so keyed consumers see no change.
            partitions = sorted(await producer.partitions_for(self.topic))
            batches: dict[int, tuple[Any, list[Bar]]] = {}
            for bar in bars:
                key = bar.symbol.encode("utf-8")
                partition = partitions[partition_for(bar.symbol, len(partitions))]
                value = encode_bar(bar)
                headers = [("spec", bar.spec.encode("utf-8"))]
                entry = batches.get(partition)
                if entry is None or entry[0].append(key=key, value=value, timestamp=None, headers=headers) is None:
                    if entry is not None:
                        await self._send(stream, producer, partition, entry, closed_at)  # full
                    entry = batches[partition] = (producer.create_batch(), [])
                    if entry[0].append(key=key, value=value, timestamp=None, headers=headers) is None:
                        raise SinkError(f"a bar of {bar.symbol} does not fit in a record batch")
                entry[1].append(bar)
            for partition, entry in batches.items():
                await self._send(stream, producer, partition, entry, closed_at)
        except SinkError:
            raise
        except Exception as exc:
            raise SinkError(f"cannot publish bars to {self.topic}: {exc}") from exc

    async def _send(
        self, stream: str, producer: Any, partition: int, entry: tuple[Any, list[Bar]], closed_at: float
    ) -> None:
        batch, bars = entry
        batch.close()
        future = await producer.send_batch(batch, self.topic, partition=partition)
        self._inflight.add(future)
        if self._producer_for is not None:
            self._stream_inflight.setdefault(stream, set()).add(future)
        future.add_done_callback(functools.partial(self._delivered, stream, bars, closed_at))

    def _delivered(self, stream: str, bars: list[Bar], closed_at: float, future: asyncio.Future[Any]) -> None:
        self._inflight.discard(future)
        if self._producer_for is not None:
            self._stream_inflight.get(stream, set()).discard(future)
        failure = asyncio.CancelledError("delivery cancelled") if future.cancelled() else future.exception()
        if failure is not None:
            if self._producer_for is not None:
                # In a transaction: the partition's next checkpoint must not commit.
                self._stream_failures.setdefault(stream, failure)
            else:
                self._error = self._error or str(failure)
            return
        self.published += len(bars)
        if self._on_published is not None:
            delay_s = time.monotonic() - closed_at
            for bar in bars:
                self._on_published(bar, delay_s)

    def _raise_delivery_error(self) -> None:
        if self._error is not None:
            error, self._error = self._error, None
            raise SinkError(f"the broker did not take bars for {self.topic}: {error}")

    async def flush(self) -> None:
        if self._inflight:
            await asyncio.gather(*list(self._inflight), return_exceptions=True)
        self._raise_delivery_error()

    async def close(self) -> None:
        if self._producer is None:
            return
        try:
            await self.flush()
        finally:
            await self._producer.stop()
            self._producer = None

    # -- the checkpoint protocol: the partition's transaction carries the bars -----------

    async def prepare(self, stream: str, offset: int, final: bool) -> None:
        """Wait for the partition's bars to be acknowledged; refuse the checkpoint if any
        was not (a transaction must not commit without one of its bars)."""
        pending = self._stream_inflight.get(stream)
        if pending:
            await asyncio.gather(*list(pending), return_exceptions=True)
        failure = self._stream_failures.pop(stream, None)
        if failure is not None:
            raise SinkError(f"the broker did not take bars of {stream}: {failure!r}") from failure
        return None

    async def committed(self, stream: str, state: Any) -> None:
        return None

    async def restore(self, stream: str, state: Any, offset: int) -> None:
        """The partition rewinds: what failed belonged to the aborted transaction."""
        self._stream_failures.pop(stream, None)
        self._stream_inflight.pop(stream, None)

    def release(self, stream: str) -> None:
        self._stream_failures.pop(stream, None)
        self._stream_inflight.pop(stream, None)
