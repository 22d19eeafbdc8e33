"""The message key only places a record; the value's ``sym`` decides the symbol, and a
record keyed by none of its ticks' symbols is counted (README, "The live service")."""

from __future__ import annotations

import logging

import pytest
from factories import T0, tick

from barsmith.ingest.ticks import decode_tick
from barsmith.sources.kafka import KeyMismatches


def test_a_key_that_is_the_symbol_is_not_counted() -> None:
    keys = KeyMismatches()
    record = tick("FENWORTH~KESMOOR", T0, 1)
    keys.check("ticks[0]", 0, b"FENWORTH~KESMOOR", decode_tick(record))  # as the scanner decodes it
    keys.check("ticks[0]", 1, b"FENWORTH~KESMOOR", record)  # as msgpack decodes it
    assert keys.counts == {}


def test_a_key_of_another_symbol_is_counted_per_partition() -> None:
    keys = KeyMismatches()
    keys.check("ticks[0]", 0, b"MARROWAY~KESMOOR", decode_tick(tick("FENWORTH~KESMOOR", T0, 1)))
    keys.check("ticks[0]", 1, b"MARROWAY~KESMOOR", tick("FENWORTH~KESMOOR", T0, 2))
    keys.check("ticks[3]", 7, b"\xff\xfe", tick("FENWORTH~KESMOOR", T0, 3))  # not even UTF-8
    assert keys.counts == {"ticks[0]": 2, "ticks[3]": 1}


def test_a_batch_is_counted_only_when_the_key_is_none_of_its_symbols() -> None:
    keys = KeyMismatches()
    batch = [tick("FENWORTH~KESMOOR", T0, 1), tick("MARROWAY~KESMOOR", T0, 1)]
    keys.check("ticks[0]", 0, b"MARROWAY~KESMOOR", batch)  # one of them: as publish --batch keys it
    keys.check("ticks[0]", 1, b"MARROWAY~KESMOOR", [decode_tick(t) for t in batch])
    assert keys.counts == {}
    keys.check("ticks[0]", 2, b"QUILLFERN~KESMOOR", batch)
    assert keys.counts == {"ticks[0]": 1}


def test_a_long_batch_is_checked_to_its_last_tick() -> None:
    keys = KeyMismatches()
    batch = [tick("FENWORTH~KESMOOR", T0, seq) for seq in range(1, 64)] + [tick("MARROWAY~KESMOOR", T0, 1)]
    decoded = [decode_tick(t) for t in batch]
    keys.check("ticks[0]", 0, b"MARROWAY~KESMOOR", decoded)  # keyed by its last tick, as publish --batch does
    keys.check("ticks[0]", 1, b"MARROWAY~KESMOOR", batch)
    keys.check("ticks[0]", 2, b"MARROWAY~KESMOOR", [*decoded[:-1], batch[-1]])  # ticks and a map
    assert keys.counts == {}
    keys.check("ticks[0]", 3, b"QUILLFERN~KESMOOR", decoded)
    keys.check("ticks[0]", 4, b"MARROWAY~KESMOOR", [[decoded[-1]]])  # a nested list has no symbol of its own
    assert keys.counts == {"ticks[0]": 1}


@pytest.mark.parametrize("value", [42, "text", {"ts": T0}, {"sym": 7}, [], [1, 2]])
def test_a_value_without_a_symbol_is_left_to_the_validator(value: object) -> None:
    keys = KeyMismatches()
    keys.check("ticks[0]", 0, b"FENWORTH~KESMOOR", value)
    assert keys.counts == {}


def test_mismatches_are_logged_at_most_once_a_minute_per_partition(caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.WARNING, logger="barsmith.kafka")
    keys = KeyMismatches(log_every_s=60.0)
    for offset in range(500):
        keys.check("ticks[0]", offset, b"MARROWAY~KESMOOR", tick("FENWORTH~KESMOOR", T0, offset + 1))
    keys.check("ticks[1]", 0, b"MARROWAY~KESMOOR", tick("FENWORTH~KESMOOR", T0, 1))
    lines = [r.getMessage() for r in caplog.records]
    assert len(lines) == 2  # the first of each partition; the rest wait for the next report
    assert lines[0].startswith("ticks[0]: 1 record(s)") and "'MARROWAY~KESMOOR'" in lines[0]
    assert "the value's sym decides" in lines[0]
    assert keys.counts == {"ticks[0]": 500, "ticks[1]": 1}


def test_the_next_report_gives_the_count_since_the_last(caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.WARNING, logger="barsmith.kafka")
    now = [0.0]
    keys = KeyMismatches(log_every_s=60.0, clock=lambda: now[0])
    for offset, when in enumerate([0.0, 10.0, 20.0, 30.0, 59.0, 61.0, 62.0]):
        now[0] = when
        keys.check("ticks[0]", offset, b"X", tick("FENWORTH~KESMOOR", T0, offset + 1))
    lines = [r.getMessage() for r in caplog.records]
    assert [line.split(" record(s)")[0] for line in lines] == ["ticks[0]: 1", "ticks[0]: 5"]
    assert "offset 5:" in lines[1]
    assert keys.counts == {"ticks[0]": 7}
