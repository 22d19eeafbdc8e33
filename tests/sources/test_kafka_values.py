"""The Kafka source's decoding of record values (a unit test of that step alone)."""

from __future__ import annotations

from dataclasses import dataclass

import msgpack
from factories import T0, tick

from barsmith.ingest.ticks import RejectReason
from barsmith.settings import KafkaSettings
from barsmith.sources.kafka import KafkaSource


@dataclass
class FakeRecord:
    """The fields of a consumer record that decoding reads."""

    offset: int
    value: bytes | None
    key: bytes | None = None


def test_a_value_above_the_size_cap_is_rejected_undecoded() -> None:
    source = KafkaSource(KafkaSettings(), max_record_bytes=2048)
    small = msgpack.packb(tick(ts=T0, seq=1))
    big = msgpack.packb([tick(ts=T0 + i, seq=i + 2) for i in range(60)])
    assert len(big) > 2048
    batch = source._decode("ticks[0]", [FakeRecord(10, small), FakeRecord(11, big), FakeRecord(12, small)])
    assert batch.positions == [10, 12]
    assert [(r.position, r.reason) for r in batch.rejects] == [(11, RejectReason.TOO_LARGE)]
    assert "max_record_bytes" in batch.rejects[0].detail and len(batch.rejects[0].record) <= 4096
    # Under the default cap the same value is an ordinary batch.
    assert KafkaSource(KafkaSettings())._decode("ticks[0]", [FakeRecord(11, big)]).positions == [11]


def test_a_value_whose_map_names_a_key_twice_is_rejected() -> None:
    """Each key once (msgpack itself would keep the last value): the value is refused with
    the key named, and the values beside it are untouched."""
    source = KafkaSource(KafkaSettings())
    good = msgpack.packb(tick(ts=T0, seq=1))
    twice = bytes([0x85]) + b"\xa3seq\x07" + good[1:]  # seq, then the tick's own four pairs
    batch = source._decode("ticks[0]", [FakeRecord(5, good), FakeRecord(6, twice), FakeRecord(7, good)])
    assert batch.positions == [5, 7]
    assert [(r.position, r.reason) for r in batch.rejects] == [(6, RejectReason.NOT_MSGPACK)]
    assert "'seq' twice" in batch.rejects[0].detail
