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
from barsmith.errors import SinkError, describe_error
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


class _OpenBatch:
    """Bars of one output partition gathered into a record batch not yet handed to the
    producer, each with the time it was handed to the sink."""

    __slots__ = ("bars", "builder", "closed_at")

    def __init__(self, builder: Any) -> None:
        self.builder = builder
        self.bars: list[Bar] = []
        self.closed_at: list[float] = []


class KafkaBarSink:
    """Publishes bars to ``topic``; ``flush()`` waits until the broker has them all.

    ``on_published(bar, delay_s)`` hears of every bar the broker acknowledged, with the
    time since it was handed over; ``producer_for(stream)`` (exactly-once) gives the
    producer of the stream's open transaction.

    Each output partition has at most one record batch on its way at a time (per
    producer: per input partition under exactly-once). Bars for a partition whose
    previous batch is not acknowledged yet gather in an open batch instead of waiting
    for it: the producer takes a partition's second batch only once the first has gone
    out, and waiting for that in ``publish`` held the whole run loop up for a broker
    round trip. The open batch goes out when the previous one is acknowledged (at
    least-once: at once, from the acknowledgement; exactly-once: with the stream's next
    bars or its checkpoint, which ``prepare`` waits for), or when it is full — then
    ``publish`` waits, which is the backpressure.
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
        # By (stream, output partition); the stream is "" at-least-once (one producer).
        self._open: dict[tuple[str, int], _OpenBatch] = {}
        self._last: dict[tuple[str, int], asyncio.Future[Any]] = {}  # the batch on its way
        self._sending: dict[tuple[str, int], asyncio.Lock] = {}  # one hand-over at a time, in order
        self._kicks: set[asyncio.Task[None]] = set()

    async def start(self) -> None:
        """Create the topic if missing (``output_partitions``); at-least-once, start the producer."""
        kafka = self._kafka
        await ensure_topic(kafka, self.topic, kafka.output_partitions)
        if self._producer_for is not None:
            return  # the partitions' transactional producers are started by their owners
        producer = bar_producer(kafka, f"{kafka.client_id}-bars")
        await start_client(producer, kafka, "bar producer", SinkError)
        self._producer = producer

    def _producer_of(self, stream: str) -> Any:
        if self._producer_for is not None:
            return self._producer_for(stream)
        if self._producer is None:
            raise SinkError(f"the bar producer for {self.topic} was not started")
        return self._producer

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        self._raise_delivery_error()
        producer = self._producer_of(stream)
        closed_at = time.monotonic()
        owner = stream if self._producer_for is not None else ""
        try:
            # Record batches instead of one send per bar: the client's per-message path
            # (a coroutine, a future and a partitioner call each) cost more than building
            # the bars. Partitions are the ones the default partitioner picks for the key
            # (partition_for, as publish uses), so keyed consumers see no change.
            partitions = sorted(await producer.partitions_for(self.topic))
            touched: set[tuple[str, int]] = set()
            for bar in bars:
                key = bar.symbol.encode("utf-8")
                slot = (owner, partitions[partition_for(bar.symbol, len(partitions))])
                value = encode_bar(bar)
                headers = [("spec", bar.spec.encode("utf-8"))]
                batch = self._open.get(slot)
                if batch is None or batch.builder.append(key=key, value=value, timestamp=None, headers=headers) is None:
                    if batch is not None:
                        await self._hand_over(slot, producer, now=True)  # full: waits for the one before
                    batch = self._open[slot] = _OpenBatch(producer.create_batch())
                    if batch.builder.append(key=key, value=value, timestamp=None, headers=headers) is None:
                        raise SinkError(f"a bar of {bar.symbol} does not fit in a record batch")
                batch.bars.append(bar)
                batch.closed_at.append(closed_at)
                touched.add(slot)
            for slot in touched:
                await self._hand_over(slot, producer)
        except SinkError:
            raise
        except Exception as exc:
            raise SinkError(f"cannot publish bars to {self.topic}: {exc}") from exc

    async def _hand_over(self, slot: tuple[str, int], producer: Any, *, now: bool = False) -> None:
        """Give the slot's open batch (if any) to the producer, in order, one at a time:
        once the batch before it is acknowledged, or ``now`` (waiting for the producer to
        take it; full, flush, checkpoint)."""
        lock = self._sending.get(slot)
        if lock is None:
            lock = self._sending[slot] = asyncio.Lock()
        async with lock:
            last = self._last.get(slot)
            if not now and last is not None and not last.done():
                return  # the acknowledgement hands it over (at-least-once) or the stream's next call
            batch = self._open.pop(slot, None)
            if batch is None:
                return
            stream, partition = slot
            batch.builder.close()
            future = await producer.send_batch(batch.builder, self.topic, partition=partition)
            self._last[slot] = future
            self._inflight.add(future)
            if self._producer_for is not None:
                self._stream_inflight.setdefault(stream, set()).add(future)
            future.add_done_callback(functools.partial(self._delivered, slot, batch))

    def _delivered(self, slot: tuple[str, int], batch: _OpenBatch, future: asyncio.Future[Any]) -> None:
        stream = slot[0]
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
        self.published += len(batch.bars)
        if self._on_published is not None:
            now = time.monotonic()
            for bar, closed_at in zip(batch.bars, batch.closed_at, strict=True):
                self._on_published(bar, now - closed_at)
        if self._producer_for is None and slot in self._open and self._producer is not None:
            # At-least-once: what gathered meanwhile goes out now, not with the next bars.
            # (Exactly-once leaves it to the stream's next call, under the runner's lock:
            # nothing may reach a transaction from beside the loop.)
            task = asyncio.get_running_loop().create_task(self._kick(slot))
            self._kicks.add(task)
            task.add_done_callback(self._kicks.discard)

    async def _kick(self, slot: tuple[str, int]) -> None:
        try:
            await self._hand_over(slot, self._producer)
        except Exception as exc:  # reported by the next publish or flush, as a failed send
            self._error = self._error or describe_error(exc)

    def _raise_delivery_error(self) -> None:
        if self._error is not None:
            error, self._error = self._error, None
            raise SinkError(f"the broker did not take bars for {self.topic}: {error}")

    async def flush(self) -> None:
        # Hand-overs started from acknowledgements may open the way for more: until none is left.
        while self._kicks or self._open or self._inflight:
            if self._kicks:
                await asyncio.gather(*list(self._kicks), return_exceptions=True)
            for slot in list(self._open):
                await self._hand_over(slot, self._producer_of(slot[0]), now=True)
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
        for slot in [slot for slot in self._open if slot[0] == stream]:
            await self._hand_over(slot, self._producer_of(stream), now=True)
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
        """The partition rewinds: what failed, and what had not gone out yet, belonged to
        the aborted transaction."""
        self.release(stream)

    def release(self, stream: str) -> None:
        self._stream_failures.pop(stream, None)
        self._stream_inflight.pop(stream, None)
        for slots in (self._open, self._last, self._sending):
            for slot in [slot for slot in slots if slot[0] == stream]:
                del slots[slot]
