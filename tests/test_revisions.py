"""Late-data revisions (README, "Revisions"): a straggler inside ``revision_window_ms``
after its time bar was published revises the bar; past the window it is late, as
without revisions. Each case by hand, then restored checkpoints and Parquet."""

from __future__ import annotations

import asyncio
import random
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from factories import T0, S, snap, trade

import barsmith
from barsmith.bars.family import SpecContext
from barsmith.bars.record import Bar
from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import CheckpointError, decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.ingest.ticks import RejectReason
from barsmith.runner import Runner
from barsmith.sinks.base import MemorySink
from barsmith.sources.base import ListSource, RecordBatch

A, B = "FENWORTH~KESMOOR", "MARROWAY~KESMOOR"
M = 60 * S
WINDOW = 5 * M


def engine(window_ns: int = WINDOW, specs: tuple[str, ...] = ("time:1m", "volume:5")) -> Engine:
    return Engine(parse_specs(list(specs), context=SpecContext(revisions=window_ns > 0)), 0, None, window_ns)


def feed(straggler_ts: int = T0 + 55 * S, straggler_px: float = 13.0) -> list[dict[str, Any]]:
    return [
        snap(A, T0, 1, bid_px=10.0, ask_px=10.5),
        trade(A, T0 + 10 * S, 2, 11.0, 1.0),
        trade(A, T0 + 50 * S, 3, 12.0, 1.0),
        trade(B, T0 + 65 * S, 1, 20.0, 1.0),  # the stream's clock passes A's first minute
        trade(A, straggler_ts, 4, straggler_px, 2.0),  # A's straggler, for that minute
    ]


def minute(bars: list[Bar], sym: str = A) -> list[dict[str, Any]]:
    return [b.as_dict() for b in bars if b.symbol == sym and b.spec == "time:1m"]


def run(e: Engine, records: list[dict[str, Any]]) -> tuple[list[Bar], list[Bar]]:
    e.process(records, list(range(len(records))), "t")
    return e.take_bars(), e.take_final_bars()


def test_a_straggler_inside_the_window_revises_its_bar_with_the_right_numbers() -> None:
    e = engine()
    published, final = run(e, feed())
    first, second = minute(published)
    assert (first["revision"], first["trades"], first["close"], first["volume"]) == (0, 2, 12.0, 2.0)
    # Revision 1 is the bar with the straggler in it: the numbers of an engine that saw
    # it in time, before the other symbol's clock closed the minute.
    in_time, _ = run(engine(0), [*feed()[:3], feed()[4], feed()[3]])
    (reference,) = minute(in_time)
    assert second["revision"] == 1 and {k: v for k, v in second.items() if k != "revision"} == reference
    assert (second["trades"], second["close"], second["high"], second["volume"]) == (3, 13.0, 13.0, 4.0)
    assert final == []  # final only once the window has passed
    assert e.take_rejects() == [] and e.stats.revisions == 1  # the straggler was used, not late


def test_once_the_window_passed_the_bar_is_final_and_a_straggler_is_late() -> None:
    e = engine()
    published, _ = run(e, feed()[:4])
    e.process([trade(B, T0 + M + WINDOW + 1, 2, 20.0, 1.0)], [5], "t")  # the window passes
    (final,) = minute(e.take_final_bars())
    assert final["revision"] == 0 and final["trades"] == 2
    published, _ = run(e, [feed()[4]])
    assert minute(published) == []
    (reject,) = e.take_rejects()
    assert reject.reason is RejectReason.LATE
    assert e.open_bar_count() >= 0 and all(b is None or b.start > T0 for b in _slots(e, A))


def _slots(e: Engine, sym: str) -> list[Any]:
    return list(e._symbols[sym].bars)


def test_a_straggler_for_a_minute_its_symbol_had_no_bar_in_gets_one() -> None:
    records = [
        trade(A, T0 + 5 * S, 1, 11.0, 1.0),
        trade(B, T0 + 2 * M + 5 * S, 1, 20.0, 1.0),  # closes minutes 0 and 1
        trade(A, T0 + M + 30 * S, 2, 12.0, 1.0),  # minute 1 of A: published at once
    ]
    published, _ = run(engine(), records)
    assert [(b["start"], b["revision"], b["trades"]) for b in minute(published)] == [(T0, 0, 1), (T0 + M, 0, 1)]


def test_final_mode_publishes_each_bar_once() -> None:
    records = [*feed(), trade(B, T0 + 20 * M, 2, 20.0, 1.0)]
    everything, once = MemorySink(), MemorySink(final_only=True)
    specs = parse_specs(["time:1m", "volume:5"], context=SpecContext(revisions=True))
    source = ListSource([RecordBatch("s", "t", records, list(range(len(records))))])
    runner = Runner(specs, 0, source, [everything, once], MemorySink(), revision_window_ns=WINDOW)
    asyncio.run(runner.serve())
    assert [(b["revision"], b["trades"]) for b in minute(everything.bars)] == [(0, 2), (1, 3)]
    assert [(b["revision"], b["trades"]) for b in minute(once.bars)] == [(1, 3)]
    keys = [(b.symbol, b.spec, b.start) for b in once.bars if b.spec == "time:1m"]
    assert len(keys) == len(set(keys))  # once each
    # Event bars are never revised: both sinks have them alike.
    assert sorted(map(repr, (b for b in everything.bars if b.spec != "time:1m"))) == sorted(
        map(repr, (b for b in once.bars if b.spec != "time:1m"))
    )


def test_revisions_survive_checkpoints_at_every_cut() -> None:
    # Each symbol in order, but delivered with delays of up to fifteen minutes: stragglers
    # for the stream, some inside the five-minute window, some past it (late).
    rng = random.Random(7)
    arrivals: list[tuple[int, int, dict[str, Any]]] = []
    for sym in (A, B, "QUILLFERN~KESMOOR"):
        ts = arrived = T0
        for seq in range(1, 60):
            ts += rng.randint(1, 40) * S
            arrived = max(arrived, ts + rng.choice([0, 0, 0, 0, 90, 240, 600, 900]) * S)
            arrivals.append((arrived, len(arrivals), trade(sym, ts, seq, float(rng.randint(9, 12)), 1.0)))
    records = [record for _, _, record in sorted(arrivals)]
    whole = engine()
    expected, expected_final = run(whole, records)
    whole.finish()
    expected += whole.take_bars()
    expected_final += whole.take_final_bars()
    assert any(b.get("revision", 0) > 0 for b in expected) and whole.stats.late > 0
    for cut in range(0, len(records), 7):
        first = engine()
        got, got_final = run(first, records[:cut])
        first.take_rejects()
        second, _ = decode_checkpoint(encode_checkpoint(first), first.specs, 0, None, WINDOW)
        more, more_final = run(second, records[cut:])
        second.finish()
        assert got + more + second.take_bars() == expected, cut
        assert got_final + more_final + second.take_final_bars() == expected_final, cut


def test_a_checkpoint_with_another_revision_window_is_refused() -> None:
    e = engine()
    with pytest.raises(CheckpointError, match="revision window"):
        decode_checkpoint(encode_checkpoint(e), e.specs, 0, None, 2 * WINDOW)


def test_read_bars_gives_the_latest_revision_of_each_bar(tmp_path: Path, feed_file: Any) -> None:
    path = feed_file([*feed(), trade(B, T0 + 20 * M, 2, 20.0, 1.0)])
    config = tmp_path / "barsmith.toml"
    config.write_text("revision_window_ms = 300000\n")
    out = tmp_path / "out"
    barsmith.replay_files([path], out, config_file=config, bars=["time:1m", "volume:5"], lateness_ms=0)
    every = pd.read_parquet(out)
    mine = every[(every["symbol"] == A) & (every["spec"] == "time:1m")]
    assert sorted(mine["revision"]) == [0, 1]  # revisions are appended
    latest = barsmith.read_bars(out)
    bar = latest[(latest["symbol"] == A) & (latest["spec"] == "time:1m")]
    assert list(bar["revision"]) == [1] and list(bar["trades"]) == [3]
    assert len(barsmith.read_bars(out, revisions=True)) == len(every)
    assert len(latest) == len(every) - 1
