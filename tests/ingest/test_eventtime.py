"""Event-time guards (README, "Event time"): one bad clock must not poison a stream,
while a real overnight gap in a recorded file still works. Each case by hand."""

from __future__ import annotations

from typing import Any

from factories import T0, S, run_engine, snap, trade

from barsmith.bars.bar import Bar
from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.ingest.eventtime import StreamLimits
from barsmith.ingest.ticks import RejectReason

A, B, C = "FENWORTH~KESMOOR", "MARROWAY~KESMOOR", "QUILLFERN~KESMOOR"
M = 60 * S
H = 3600 * S
YEAR = 365 * 24 * H
SPECS = ("time:1m", "volume:3")


def session(start: int, seqs: dict[str, int], minutes: int = 5) -> list[dict[str, Any]]:
    """A trade per symbol every 20 s for ``minutes`` minutes (advances ``seqs``)."""
    out = []
    for step in range(minutes * 3):
        for sym in (A, B, C):
            seqs[sym] = seqs.get(sym, 0) + 1
            out.append(trade(sym, start + step * 20 * S + {A: 0, B: S, C: 2 * S}[sym], seqs[sym], 10.0, 1.0))
    return out


def rejects_by_reason(engine: Engine) -> dict[str, list[int]]:
    out: dict[str, list[int]] = {}
    for reject in engine.take_rejects():
        out.setdefault(reject.reason.value, []).append(reject.position)
    return out


def of(bars: list[Bar], sym: str, spec: str = "time:1m") -> list[tuple[int, int, int]]:
    return [(b.start, b.trades, b.messages) for b in bars if b.symbol == sym and b.spec == spec]


def test_a_tick_years_ahead_is_rejected_and_poisons_nothing() -> None:
    seqs: dict[str, int] = {}
    feed = session(T0, seqs)
    bogus = trade(B, T0 + 3 * M + 10 * YEAR, 100, 10.0, 1.0)  # a vendor clock fault
    poisoned = [*feed[:25], bogus, *feed[25:]]
    clean_bars, _ = run_engine(feed, SPECS)
    bars, engine = run_engine(poisoned, SPECS)
    assert rejects_by_reason(engine) == {"future": [25]}
    assert engine.stats.late == 0 and engine.stats.time_regressions == 0
    for sym in (A, C):  # every other symbol: exactly the clean run's bars
        assert [b for b in bars if b.symbol == sym] == [b for b in clean_bars if b.symbol == sym]
    # Its own symbol only lost that one message (seq 100 was never seen: no gap either).
    assert of(bars, B) == of(clean_bars, B)
    book = engine.book(B)
    assert book is not None and book.last_ts < T0 + H  # its clock was not moved


def test_an_overnight_gap_in_a_recorded_file_is_followed() -> None:
    seqs: dict[str, int] = {}
    evening = session(T0, seqs)
    morning = session(T0 + 15 * H, seqs)  # fifteen hours later, every symbol
    bars, engine = run_engine(evening + morning, SPECS)
    assert rejects_by_reason(engine) == {}
    unguarded, _ = run_engine(evening + morning, SPECS, limits=StreamLimits(max_jump_ns=100 * YEAR))
    assert bars == unguarded
    minutes = [b for b in bars if b.symbol == A and b.spec == "time:1m"]
    assert [b.start for b in minutes] == [T0 + i * M for i in range(5)] + [T0 + 15 * H + i * M for i in range(5)]
    assert [b.complete for b in minutes] == [True] * 9 + [False]


def test_a_weekend_gap_of_a_single_symbol_file_is_followed() -> None:
    recs = [trade(A, T0 + i * S, i + 1, 10.0, 1.0) for i in range(5)]
    recs += [trade(A, T0 + 64 * H + i * S, 6 + i, 11.0, 1.0) for i in range(5)]
    bars, engine = run_engine(recs, ("time:1m",))
    assert rejects_by_reason(engine) == {}
    assert [(b.start, b.trades) for b in bars] == [(T0, 5), (T0 + 64 * H, 5)]


def test_the_first_tick_of_a_stream_needs_confirmation_too() -> None:
    seqs: dict[str, int] = {}
    feed = session(T0, seqs, minutes=2)
    bogus = trade(A, T0 + 20 * YEAR, 1, 10.0, 1.0)
    _, engine = run_engine([bogus, *feed], SPECS)
    assert rejects_by_reason(engine) == {"future": [0]}
    assert engine.stats.late == 0 and engine.watermark_ns < T0 + H


def test_a_symbol_whose_clock_comes_back_contradicts_its_own_jump() -> None:
    recs = [trade(A, T0, 1, 10.0, 1.0), trade(A, T0 + 2 * H, 2, 10.0, 1.0), trade(A, T0 + S, 3, 10.0, 1.0)]
    bars, engine = run_engine(recs, ("time:1m",))
    assert rejects_by_reason(engine) == {"future": [1]}
    (bar,) = bars
    assert (bar.trades, bar.gaps) == (2, 1)  # the book never saw seq 2: a gap


def test_many_ticks_in_the_streams_time_contradict_a_lone_jump() -> None:
    # Two symbols only: B's stuck clock is contradicted by A's ticks alone, after
    # contradict_messages of them.
    limits = StreamLimits(contradict_messages=10)
    recs = [trade(A, T0, 1, 10.0, 1.0), trade(B, T0, 1, 10.0, 1.0), trade(B, T0 + 5 * H, 2, 10.0, 1.0)]
    recs += [trade(A, T0 + i * S, i + 1, 10.0, 1.0) for i in range(1, 12)]
    _, engine = run_engine(recs, ("time:1m",), limits=limits, finish=False)
    assert rejects_by_reason(engine) == {"future": [2]}


def test_when_the_hold_is_full_an_uncontradicted_jump_is_taken() -> None:
    # After a gap only one symbol trades for a while; nothing contradicts it.
    limits = StreamLimits(max_held=5)
    recs = [trade(A, T0, 1, 10.0, 1.0), trade(B, T0 + S, 1, 10.0, 1.0)]
    recs += [trade(A, T0 + 10 * H + i * S, 2 + i, 10.0, 1.0) for i in range(8)]
    bars, engine = run_engine(recs, ("time:1m",), limits=limits)
    assert rejects_by_reason(engine) == {}
    assert [(b.symbol, b.start, b.trades) for b in bars] == [(A, T0, 1), (B, T0, 1), (A, T0 + 10 * H, 8)]


def test_a_full_hold_rejects_its_oldest_tick_when_the_stream_spoke_after_it() -> None:
    limits = StreamLimits(max_held=3)
    recs = [trade(A, T0, 1, 10.0, 1.0), trade(B, T0, 1, 10.0, 1.0)]
    recs += [trade(C, T0 + 9 * YEAR + i, 1 + i, 10.0, 1.0) for i in range(2)]  # C's clock is stuck ahead
    recs += [trade(A, T0 + S, 2, 10.0, 1.0)]  # one other symbol spoke since
    recs += [trade(C, T0 + 9 * YEAR + i, 1 + i, 10.0, 1.0) for i in range(2, 4)]
    _, engine = run_engine(recs, ("time:1m",), limits=limits, finish=False)
    assert rejects_by_reason(engine) == {"future": [2]}


def test_a_tick_far_behind_its_symbols_time_is_rejected_as_backdated() -> None:
    recs = [
        snap(A, T0 + H, 1, bid_px=10.0, ask_px=10.5),
        trade(A, T0 + H + S, 2, 10.0, 1.0),
        trade(A, T0, 3, 99.0, 1.0),  # an hour behind: not clamped into the current bar
        trade(A, T0 + H + 2 * S, 4, 10.0, 1.0),
        trade(A, T0 + H + 3 * S - 100 * S, 5, 11.0, 1.0),  # 100 s behind: clamped, as before
    ]
    bars, engine = run_engine(recs, ("time:1m",))
    assert rejects_by_reason(engine) == {"backdated": [2]}
    (bar,) = bars
    assert (bar.trades, bar.high, bar.gaps) == (3, 11.0, 1)
    assert engine.stats.time_regressions == 1


def test_the_wall_clock_limits_the_service_and_confirms_live_ticks() -> None:
    engine = Engine(parse_specs(["time:1m"]), 0, StreamLimits(max_ahead_of_wall_ns=10 * S))
    engine.set_wall_clock(T0)
    engine.process([trade(A, T0 - S, 1, 10.0, 1.0), trade(A, T0 + 11 * S, 2, 10.0, 1.0)], [0, 1], "t")
    # The live tick was used at once (the wall clock confirms it); the other is too far ahead.
    book = engine.book(A)
    assert book is not None and book.last_seq == 1
    (reject,) = engine.take_rejects()
    assert reject.reason is RejectReason.FUTURE and "wall clock" in reject.detail


def test_held_ticks_travel_in_checkpoints() -> None:
    specs = parse_specs(list(SPECS))
    seqs: dict[str, int] = {}
    evening = session(T0, seqs, minutes=2)
    morning = session(T0 + 15 * H, seqs, minutes=2)
    whole = Engine(specs, 0)
    whole.process(evening + morning, list(range(len(evening + morning))), "t")
    whole.finish()
    expected = whole.take_bars()
    first = Engine(specs, 0)
    cut = len(evening) + 1  # the first morning tick is held here
    first.process((evening + morning)[:cut], list(range(cut)), "t")
    bars = first.take_bars()
    first.take_rejects()
    second, _ = decode_checkpoint(encode_checkpoint(first), specs, 0)
    second.process((evening + morning)[cut:], list(range(cut, len(evening + morning))), "t")
    second.finish()
    assert bars + second.take_bars() == expected


def test_symbols_past_the_limit_are_rejected_with_a_reason() -> None:
    recs = [trade(f"JUNK{i:03d}", T0 + i, 1, 10.0, 1.0) for i in range(8)]
    bars, engine = run_engine(recs, ("time:1m",), limits=StreamLimits(max_symbols=5))
    assert engine.symbols == 5 and len(bars) == 5
    assert rejects_by_reason(engine) == {"symbol_limit": [5, 6, 7]}


def test_a_jump_waits_for_exactly_one_more_symbol() -> None:
    seqs: dict[str, int] = {}
    evening = session(T0, seqs, minutes=1)
    morning = session(T0 + 15 * H, seqs, minutes=1)
    engine = Engine(parse_specs(["time:1m"]), 0)
    engine.process(evening, list(range(len(evening))), "t")
    engine.process(morning[:1], [100], "t")  # A's first morning tick: held
    book = engine.book(A)
    assert book is not None and book.last_ts < T0 + H
    engine.process(morning[1:2], [101], "t")  # B's: the jump is confirmed, both are used
    assert book.last_ts >= T0 + 15 * H and engine.watermark_ns == morning[1]["ts"]
