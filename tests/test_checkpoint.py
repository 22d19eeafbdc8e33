"""Checkpoints: restoring mid-stream gives exactly the uninterrupted run; unknown
versions and changed settings are refused with advice, never misread."""

from __future__ import annotations

from pathlib import Path
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
from barsmith.errors import BarSpecError

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
        snap("FENWORTH~KESMOOR", T0, 1, bid_px=1.0, ask_px=1.5),
        trade("FENWORTH~KESMOOR", T0 + 59 * S, 2, 1.25, 10.0),
        trade("FENWORTH~KESMOOR", T0 + 61 * S, 3, 1.5, 10.0),  # seals the first minute (not yet due)
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
    engine.process([trade("FENWORTH~KESMOOR", T0, 1, 1.0, 5.0)] * 1, [0], "t")
    engine.finish()
    with pytest.raises(Exception, match="pending"):
        encode_checkpoint(engine)


V1_SPECS = parse_specs(["time:1m", "volume:7", "trades:4"])
V1_CHECKPOINT = Path(__file__).parent / "data" / "checkpoint-v1.msgpack"
V1_CUT = 61


def v1_feed() -> list[dict[str, Any]]:
    """The feed behind tests/data/checkpoint-v1.msgpack: that file is a real version-1
    checkpoint, written by barsmith 0.1.0's own encoder after the first 61 records, with
    the exactly-once Parquet sink's state (22 carried bars) in its meta (its symbols were
    respelled since, when the demo venue got its own code: string edits, the structure as
    written)."""
    recs: list[dict[str, Any]] = []
    listings = (("FENWORTH~KESMOOR", 0, 10.0), ("MARROWAY~KESMOOR", 3 * S, 20.0))
    for sym, offset, base in listings:
        recs.append(snap(sym, T0 + offset, 1, bid_px=base, bid_qty=5.0, ask_px=base + 0.5, ask_qty=5.0))
    seqs = dict.fromkeys([sym for sym, _, _ in listings], 1)
    for i in range(1, 60):
        for sym, offset, base in listings:
            seqs[sym] += 1
            ts = T0 + offset + i * 7 * S
            if i % 2:
                recs.append(trade(sym, ts, seqs[sym], base + 0.5 * (i % 3), float(1 + i % 4)))
            else:
                recs.append(
                    {"sym": sym, "ts": ts, "seq": seqs[sym], "kind": "delta", "ask_px": base + 0.25 * (1 + i % 3)}
                )
    return recs


async def test_a_version_1_checkpoint_is_upgraded_and_continues_the_stream(tmp_path: Path) -> None:
    from barsmith.sinks.parquet import ParquetPartSink

    recs = v1_feed()
    whole = Engine(V1_SPECS, 2 * S)
    expected = run(recs, whole)
    whole.finish()
    expected += whole.take_bars()

    engine, meta = decode_checkpoint(V1_CHECKPOINT.read_bytes(), V1_SPECS, 2 * S)
    assert meta["offset"] == V1_CUT
    # Its carried Parquet bars (positional rows in version 1) come back as bars.
    sink = ParquetPartSink(tmp_path, V1_SPECS, roll_interval_s=3600)
    await sink.restore("ticks[0]", meta["sinks"]["parquet"], V1_CUT)
    await sink.publish("ticks[0]", run(recs[V1_CUT:], engine, V1_CUT))
    engine.finish()
    await sink.publish("ticks[0]", engine.take_bars())
    await sink.prepare("ticks[0]", len(recs), final=True)
    restored = sorted(tuple(bar.values) for bar in sink._buffers["ticks[0]"].bars)
    # Everything equals an uninterrupted run: the 22 bars before the cut and the rest.
    assert len(restored) == len(expected) and restored == sorted(tuple(bar.values) for bar in expected)
    assert books_of(engine) == books_of(whole) and engine.stats == whole.stats


def test_a_version_1_checkpoint_with_other_groups_is_refused() -> None:
    with pytest.raises(CheckpointError, match="restore the old settings"):
        decode_checkpoint(V1_CHECKPOINT.read_bytes(), parse_specs(["time:1m@core", "volume:7", "trades:4"]), 2 * S)


def test_a_checkpoint_written_with_the_old_ticks_spelling_continues_under_trades() -> None:
    """``ticks:N`` was renamed ``trades:N`` (same rule): a checkpoint written before the
    rename, by a service whose settings now say ``trades:N``, continues; its per-spec
    counters follow the new spelling. (The version-1 file above holds ``ticks:4`` too.)"""
    recs = v1_feed()
    engine = Engine(V1_SPECS, 2 * S)
    run(recs[:V1_CUT], engine)
    payload = msgpack.unpackb(encode_checkpoint(engine), raw=False, strict_map_key=False)
    old = {"trades:4": "ticks:4"}
    payload["specs"] = [old.get(t, t) for t in payload["specs"]]
    payload["layouts"] = [[old.get(t, t), g] for t, g in payload["layouts"]]
    payload["engine"]["stats"][7] = {old.get(k, k): v for k, v in payload["engine"]["stats"][7].items()}
    assert "ticks:4" in payload["engine"]["stats"][7]
    restored, _ = decode_checkpoint(msgpack.packb(payload), V1_SPECS, 2 * S)
    assert restored.stats == engine.stats and "trades:4" in restored.stats.bars


def test_the_ticks_spelling_is_refused_with_the_new_one() -> None:
    with pytest.raises(BarSpecError, match=r"'ticks:4@core'.*now trades:.*write trades:4@core"):
        parse_specs(["ticks:4@core"])


V2_CHECKPOINT = Path(__file__).parent / "data" / "checkpoint-v2.msgpack"


def test_a_version_2_checkpoint_continues_the_stream() -> None:
    # tests/data/checkpoint-v2.msgpack: written by the version-2 encoder (barsmith before
    # trade signing) after the first 61 records of v1_feed(), with V1_SPECS and lateness 2 s.
    recs = v1_feed()
    whole = Engine(V1_SPECS, 2 * S)
    expected = run(recs, whole)
    whole.finish()
    expected += whole.take_bars()
    assert msgpack.unpackb(V2_CHECKPOINT.read_bytes())["version"] == 2
    engine, meta = decode_checkpoint(V2_CHECKPOINT.read_bytes(), V1_SPECS, 2 * S)
    assert meta == {"offset": V1_CUT}
    got = run(recs[V1_CUT:], engine, V1_CUT)
    engine.finish()
    got += engine.take_bars()
    assert sorted(tuple(b.values) for b in got) == sorted(tuple(b.values) for b in expected[len(expected) - len(got) :])
    assert books_of(engine) == books_of(whole) and engine.stats == whole.stats


RICH_SPECS = parse_specs(
    ["time:1s@all", "time:1m@all", "trades:3@all", "volume-imbalance:3@all", "tick-imbalance:2,span=2"]
)


@settings(max_examples=80, deadline=None)
@given(feeds(), st.data())
def test_every_group_and_imbalance_family_restores_anywhere(recs: list[dict[str, Any]], data: st.DataObject) -> None:
    # The statistic groups' accumulators, the books' trade-sign memory and the imbalance
    # families' per-symbol state all come back: the run continues as if never stopped.
    cut = data.draw(st.integers(0, len(recs)))
    whole = Engine(RICH_SPECS, S)
    expected = run(recs, whole)
    memory = sorted((b.symbol, b.last_trade_px, b.tick_dir) for b in whole.books())  # before finish()
    whole.finish()
    expected += whole.take_bars()
    first = Engine(RICH_SPECS, S)
    got = run(recs[:cut], first)
    first.take_rejects()
    second, _ = decode_checkpoint(encode_checkpoint(first), RICH_SPECS, S)
    got += run(recs[cut:], second, cut)
    assert sorted((b.symbol, b.last_trade_px, b.tick_dir) for b in second.books()) == memory
    second.finish()
    got += second.take_bars()
    assert got == expected
