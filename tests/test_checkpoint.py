"""Checkpoints: restoring mid-stream gives exactly the uninterrupted run; unknown
versions and changed settings are refused with advice, never misread."""

from __future__ import annotations

from typing import Any

import msgpack
import pytest
from factories import FEED_SPECS as SPECS
from factories import T0, S, feeds, snap, trade
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import FORMAT_VERSION, CheckpointError, decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine

SPEC_LIST = parse_specs(list(SPECS))


def books_of(engine: Engine) -> list[tuple[Any, ...]]:
    return sorted(
        (b.symbol, b.status, b.last_seq, b.last_ts, b.bid_px, b.bid_qty, b.ask_px, b.ask_qty) for b in engine.books()
    )


def run(records: list[Any], engine: Engine, start: int = 0) -> list[Any]:
    engine.process(records, list(range(start, start + len(records))), "test")
    return engine.take_bars()


@settings(max_examples=120, deadline=None)
@given(feeds(), st.data())
def test_restore_anywhere_equals_the_uninterrupted_run(recs: list[dict[str, Any]], data: st.DataObject) -> None:
    lateness = 2 * S
    cut = data.draw(st.integers(0, len(recs)))
    whole = Engine(SPEC_LIST, lateness)
    expected = run(recs, whole)
    whole_books = books_of(whole)  # before finish(), which decides held ticks
    whole.finish()
    expected += whole.take_bars()

    first = Engine(SPEC_LIST, lateness)
    got = run(recs[:cut], first)
    first.take_rejects()
    blob = encode_checkpoint(first, {"offset": cut})
    second, meta = decode_checkpoint(blob, SPEC_LIST, lateness)
    assert meta == {"offset": cut}
    got += run(recs[cut:], second, cut)
    assert books_of(second) == whole_books
    second.finish()
    got += second.take_bars()
    assert got == expected
    assert second.stats == whole.stats


def test_sealed_and_open_bars_survive() -> None:
    engine = Engine(parse_specs(["time:1m", "volume:100"]), 5 * S)
    recs = [
        snap("FENWORTH.KMX", T0, 1, bid_px=1.0, ask_px=1.5),
        trade("FENWORTH.KMX", T0 + 59 * S, 2, 1.25, 10.0),
        trade("FENWORTH.KMX", T0 + 61 * S, 3, 1.5, 10.0),  # seals the first minute (not yet due)
    ]
    run(recs, engine)
    state = engine.to_state()
    assert len(state["due"]) == 2 and len(state["bars"]) == 3  # 2 time bars + 1 open volume bar
    restored, _ = decode_checkpoint(encode_checkpoint(engine), engine.specs, engine.lateness_ns)
    restored.close_through(T0 + 10 * 60 * S)
    original_bars = run([], engine)
    engine.close_through(T0 + 10 * 60 * S)
    assert restored.take_bars() == engine.take_bars() + original_bars


def checkpoint_with(**changes: Any) -> bytes:
    engine = Engine(SPEC_LIST, S)
    payload = msgpack.unpackb(encode_checkpoint(engine))
    payload.update(changes)
    return bytes(msgpack.packb(payload))


@pytest.mark.parametrize(
    ("blob", "message"),
    [
        (checkpoint_with(version=FORMAT_VERSION + 1), "written by a newer barsmith"),
        (checkpoint_with(version=0), "no longer reads it"),
        (checkpoint_with(format="something-else"), "not a barsmith checkpoint"),
        (b"\xc1\xc1", "not a barsmith checkpoint"),
        (checkpoint_with(specs=["time:5m"]), "restore the old settings"),
        (checkpoint_with(engine={"bars": []}), "damaged"),
    ],
)
def test_unreadable_checkpoints_are_refused_with_advice(blob: bytes, message: str) -> None:
    with pytest.raises(CheckpointError, match=message):
        decode_checkpoint(blob, SPEC_LIST, S)


def test_pending_output_must_be_taken_first() -> None:
    engine = Engine(SPEC_LIST, 0)
    engine.process([trade("FENWORTH.KMX", T0, 1, 1.0, 5.0)] * 1, [0], "t")
    engine.finish()
    with pytest.raises(Exception, match="pending"):
        encode_checkpoint(engine)


def test_a_version_1_checkpoint_is_read_as_holding_no_ticks() -> None:
    # Version 1 predates the event-time guard: its watermark is the stream's confirmed time.
    engine = Engine(SPEC_LIST, S)
    recs = [trade("FENWORTH.KMX", T0, 1, 10.0, 1.0), trade("MARROWAY.KMX", T0 + S, 1, 5.0, 1.0)]
    run(recs, engine)
    payload = msgpack.unpackb(encode_checkpoint(engine), strict_map_key=False)
    payload["version"] = 1
    del payload["engine"]["guard"], payload["engine"]["horizon"]
    restored, _ = decode_checkpoint(bytes(msgpack.packb(payload)), SPEC_LIST, S)
    # A tick in the stream's time is used at once, not held for confirmation.
    restored.process([trade("FENWORTH.KMX", T0 + 2 * S, 2, 11.0, 1.0)], [2], "t")
    book = restored.book("FENWORTH.KMX")
    assert book is not None and book.last_seq == 2
