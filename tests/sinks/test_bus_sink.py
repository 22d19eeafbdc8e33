"""The bus sink without a broker: a stand-in producer records the record batches it is
given, and the test decides when the broker acknowledges them.

Each output partition has one batch on its way at a time; bars for a partition whose
batch is not acknowledged yet gather instead of waiting for it, and go out after it, in
order. Nothing is lost on the way: ``flush`` (at-least-once) and ``prepare``
(exactly-once) hand over what gathered and wait for it; a rewind drops what had not
gone out, since it belonged to the aborted transaction."""

from __future__ import annotations

import asyncio
from typing import Any

import pytest

from barsmith.bars.record import Bar
from barsmith.bus.topics import partition_for
from barsmith.errors import SinkError
from barsmith.settings import KafkaSettings
from barsmith.sinks.kafka import KafkaBarSink, decode_bar

PARTITIONS = 8
SYM = "FENWORTH~KESMOOR"  # every bar of the test: one output partition
OTHER = next(s for s in ("MARROWAY~KESMOOR", "QUILLFERN~KESMOOR") if partition_for(s, 8) != partition_for(SYM, 8))


class _Builder:
    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self.values: list[bytes] = []
        self.closed = False

    def append(self, *, key: bytes, value: bytes, timestamp: Any, headers: Any) -> object | None:
        if self.closed or len(self.values) >= self.capacity:
            return None  # full, as a real builder says
        self.values.append(value)
        return object()

    def close(self) -> None:
        self.closed = True


class _Producer:
    """Takes every batch at once and keeps its future for the test to resolve."""

    def __init__(self, capacity: int = 1_000) -> None:
        self.capacity = capacity
        self.sent: list[tuple[int, _Builder, asyncio.Future[None]]] = []

    async def partitions_for(self, topic: str) -> set[int]:
        return set(range(PARTITIONS))

    def create_batch(self) -> _Builder:
        return _Builder(self.capacity)

    async def send_batch(self, batch: _Builder, topic: str, *, partition: int) -> asyncio.Future[None]:
        assert batch.closed
        future: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        self.sent.append((partition, batch, future))
        return future

    def ack(self, index: int, failure: BaseException | None = None) -> None:
        future = self.sent[index][2]
        if failure is None:
            future.set_result(None)
        else:
            future.set_exception(failure)

    def seqs(self, index: int) -> list[int]:
        return [decode_bar(value)["seq"] for value in self.sent[index][1].values]


def _bars(sym: str, *seqs: int) -> list[Bar]:
    return [Bar(("spec", "symbol", "end", "seq"), ("ticks:10", sym, 1_000 + seq, seq)) for seq in seqs]


async def _settle() -> None:
    for _ in range(5):
        await asyncio.sleep(0)


def _at_least_once(producer: _Producer, seen: list[Bar]) -> KafkaBarSink:
    sink = KafkaBarSink(KafkaSettings(), "bars", on_published=lambda bar, _delay: seen.append(bar))
    sink._producer = producer  # what start() would make, without a broker
    return sink


async def test_bars_gather_behind_a_batch_on_its_way_and_follow_it_in_order() -> None:
    producer, seen = _Producer(), []
    sink = _at_least_once(producer, seen)
    await sink.publish("ticks[0]", _bars(SYM, 1, 2))
    await sink.publish("ticks[1]", _bars(SYM, 3))  # the first batch is not acknowledged: gathers
    await sink.publish("ticks[0]", _bars(SYM, 4))
    await sink.publish("ticks[0]", _bars(OTHER, 9))  # another partition goes at once
    assert [(p, producer.seqs(i)) for i, (p, _b, _f) in enumerate(producer.sent)] == [
        (partition_for(SYM, 8), [1, 2]),
        (partition_for(OTHER, 8), [9]),
    ]
    producer.ack(0)
    await _settle()  # the acknowledgement sends what gathered, without waiting for more bars
    assert producer.seqs(2) == [3, 4]
    assert [bar.seq for bar in seen] == [1, 2]
    flush = asyncio.create_task(sink.flush())
    await _settle()
    assert not flush.done()  # waits for every batch on its way
    producer.ack(1)
    producer.ack(2)
    await flush
    assert sorted(bar.seq for bar in seen) == [1, 2, 3, 4, 9]
    assert sink.published == 5


async def test_flush_hands_over_what_gathered() -> None:
    producer, seen = _Producer(), []
    sink = _at_least_once(producer, seen)
    await sink.publish("ticks[0]", _bars(SYM, 1))
    await sink.publish("ticks[0]", _bars(SYM, 2))
    flush = asyncio.create_task(sink.flush())
    await _settle()
    producer.ack(0)
    await _settle()
    assert len(producer.sent) == 2 and producer.seqs(1) == [2]
    producer.ack(1)
    await flush
    assert [bar.seq for bar in seen] == [1, 2]


async def test_a_full_batch_goes_out_at_once_and_the_rest_gathers() -> None:
    producer, seen = _Producer(capacity=2), []
    sink = _at_least_once(producer, seen)
    await sink.publish("ticks[0]", _bars(SYM, 1, 2, 3, 4, 5))
    assert [producer.seqs(i) for i in range(len(producer.sent))] == [[1, 2], [3, 4]]
    producer.ack(0)
    producer.ack(1)
    await _settle()
    assert producer.seqs(2) == [5]
    producer.ack(2)
    await sink.flush()
    assert [bar.seq for bar in seen] == [1, 2, 3, 4, 5]


async def test_a_failed_batch_stops_the_next_publish() -> None:
    producer, seen = _Producer(), []
    sink = _at_least_once(producer, seen)
    await sink.publish("ticks[0]", _bars(SYM, 1))
    producer.ack(0, OSError("broker gone"))
    await _settle()
    with pytest.raises(SinkError, match="broker gone"):
        await sink.publish("ticks[0]", _bars(SYM, 2))


async def test_exactly_once_gathered_bars_wait_for_the_streams_checkpoint() -> None:
    producers = {"ticks[0]": _Producer(), "ticks[1]": _Producer()}
    sink = KafkaBarSink(KafkaSettings(), "bars", producer_for=producers.__getitem__)
    await sink.publish("ticks[0]", _bars(SYM, 1))
    await sink.publish("ticks[0]", _bars(SYM, 2))
    await sink.publish("ticks[1]", _bars(SYM, 7))  # its own producer: no batch ahead of it
    mine = producers["ticks[0]"]
    mine.ack(0)
    await _settle()
    assert len(mine.sent) == 1  # nothing reaches a transaction from beside the run loop
    prepare = asyncio.create_task(sink.prepare("ticks[0]", 10, False))
    await _settle()
    assert len(mine.sent) == 2 and mine.seqs(1) == [2] and not prepare.done()
    mine.ack(1)
    await prepare
    assert producers["ticks[1]"].seqs(0) == [7]


async def test_exactly_once_a_rewind_drops_what_had_not_gone_out() -> None:
    producer = _Producer()
    sink = KafkaBarSink(KafkaSettings(), "bars", producer_for=lambda _stream: producer)
    await sink.publish("ticks[0]", _bars(SYM, 1))
    await sink.publish("ticks[0]", _bars(SYM, 2))  # gathers behind the first
    producer.ack(0, OSError("transaction aborted"))
    await _settle()
    await sink.restore("ticks[0]", None, 0)  # the partition rewinds: its transaction was aborted
    await sink.publish("ticks[0]", _bars(SYM, 3))
    assert [producer.seqs(i) for i in range(len(producer.sent))] == [[1], [3]]  # 2 is built again
    producer.ack(1)
    await sink.prepare("ticks[0]", 10, False)  # the failure went with the aborted transaction


async def test_exactly_once_a_failed_batch_refuses_the_checkpoint() -> None:
    producer = _Producer()
    sink = KafkaBarSink(KafkaSettings(), "bars", producer_for=lambda _stream: producer)
    await sink.publish("ticks[0]", _bars(SYM, 1))
    producer.ack(0, OSError("broker gone"))
    with pytest.raises(SinkError, match="broker gone"):
        await sink.prepare("ticks[0]", 10, False)
