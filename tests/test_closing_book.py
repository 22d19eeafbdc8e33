"""A bar's closing book is the book after the bar's own last message — never one that
already saw a message outside the bar (README, "Bars": ``bid_close``/``ask_close``/
``spread_close``). Each case is worked by hand, with every column of the bar."""

from __future__ import annotations

from typing import Any

from factories import T0, S, run_engine, snap, tick, trade

from barsmith.bars.bar import Bar
from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine

SYM = "FENWORTH~KESMOOR"
OTHER = "MARROWAY~KESMOOR"
M = 60 * S


def columns(bar: Bar) -> dict[str, Any]:
    return bar.as_dict()


def expected_first_minute(**changes: Any) -> dict[str, Any]:
    """The first minute of the feeds below: a snapshot 10.0/10.5 at T0 and one trade
    of 2 at 10.5 at T0 + 30 s, a spread of 0.5 all minute."""
    bar = {
        "symbol": SYM,
        "spec": "time:1m",
        "start": T0,
        "end": T0 + M,
        "open": 10.5,
        "high": 10.5,
        "low": 10.5,
        "close": 10.5,
        "volume": 2.0,
        "notional": 21.0,
        "vwap": 10.5,
        "trades": 1,
        "messages": 2,
        "gaps": 0,
        "bid_close": 10.0,
        "ask_close": 10.5,
        "spread_close": 0.5,
        "spread_mean": 0.5,
        "spread_min": 0.5,
        "spread_max": 0.5,
        "complete": True,
    }
    bar.update(changes)
    return bar


def live_minute() -> list[dict[str, Any]]:
    return [
        snap(SYM, T0, 1, bid_px=10.0, bid_qty=3.0, ask_px=10.5, ask_qty=4.0),
        trade(SYM, T0 + 30 * S, 2, 10.5, 2.0),
    ]


def test_a_gap_opening_the_next_interval_leaves_the_closed_bar_live() -> None:
    # The book is live through the bar's last message (seq 2); the next minute opens
    # with seq 5 (a gap). The first bar closes with the live book it ended with.
    recs = [*live_minute(), tick(SYM, T0 + M + 5 * S, 5, bid_px=10.25)]
    bars, _ = run_engine(recs, specs=("time:1m",), lateness_ns=0)
    assert columns(bars[0]) == expected_first_minute()
    # The gap belongs to the second bar: it counts it, and its book is resyncing
    # from then on (the pre-gap spread held for the 5 s before the gap message).
    second = columns(bars[1])
    assert (second["gaps"], second["messages"], second["bid_close"], second["spread_close"]) == (1, 1, None, None)
    assert (second["spread_mean"], second["spread_min"], second["spread_max"]) == (0.5, 0.5, 0.5)


def test_a_gap_opening_the_next_interval_on_another_symbol_does_not_matter() -> None:
    # Control: the same bar, closed by another symbol's clock instead.
    recs = [*live_minute(), trade(OTHER, T0 + M + 5 * S, 1, 7.0, 1.0)]
    bars, _ = run_engine(recs, specs=("time:1m",), lateness_ns=0)
    assert columns(bars[0]) == expected_first_minute()


def test_a_snapshot_opening_the_next_interval_does_not_revive_a_resyncing_bar() -> None:
    # Live, then a gap at seq 4 (T0 + 40 s): the book is resyncing through the bar's
    # last message. The next minute opens with a snapshot at 11.0/11.25. The first
    # bar must close resyncing (null closing book), not with the stale pre-gap quotes.
    recs = [
        *live_minute(),
        tick(SYM, T0 + 40 * S, 4, ask_px=10.75),
        snap(SYM, T0 + M, 5, bid_px=11.0, bid_qty=1.0, ask_px=11.25, ask_qty=1.0),
    ]
    bars, _ = run_engine(recs, specs=("time:1m",), lateness_ns=0)
    # The spread was 0.5 for the 40 s before the gap, then undefined.
    assert columns(bars[0]) == expected_first_minute(
        messages=3, gaps=1, bid_close=None, ask_close=None, spread_close=None
    )
    second = columns(bars[1])
    assert (second["bid_close"], second["ask_close"], second["spread_close"]) == (11.0, 11.25, 0.25)
    # Incomplete (input ended at its first message): its spread window [T0 + M, T0 + M)
    # is empty, so no spread statistics.
    assert (second["spread_mean"], second["gaps"], second["complete"]) == (None, 0, False)


def test_the_sweep_that_a_symbols_own_message_triggers_takes_the_book_before_it() -> None:
    # With lateness 0 the message at T0 + M closes the first minute itself (the sweep
    # runs before the bar would be sealed): the same rule must hold on that path.
    recs = [*live_minute(), tick(SYM, T0 + M, 9, bid_px=10.25)]
    bars, _ = run_engine(recs, specs=("time:1m",), lateness_ns=0, finish=False)
    assert [columns(b) for b in bars] == [expected_first_minute()]


def test_the_idle_rule_closes_with_the_book_after_the_bars_last_message() -> None:
    engine = Engine(parse_specs(["time:1m"]), 5 * S)
    engine.process(live_minute(), [0, 1], "t")
    engine.close_through(T0 + M)
    assert [columns(b) for b in engine.take_bars()] == [expected_first_minute()]


def test_a_checkpoint_between_a_bar_and_the_gap_that_follows_changes_nothing() -> None:
    specs = parse_specs(["time:1m", "volume:2"])
    recs = [*live_minute(), tick(SYM, T0 + M + 5 * S, 5, bid_px=10.25)]
    first = Engine(specs, 0)
    first.process(recs[:2], [0, 1], "t")
    bars = first.take_bars()
    engine, _ = decode_checkpoint(encode_checkpoint(first), specs, 0)
    engine.process(recs[2:], [2], "t")
    bars += engine.take_bars()
    time_bars = [b for b in bars if b.spec == "time:1m"]
    assert [columns(b) for b in time_bars] == [expected_first_minute()]


def test_an_event_bar_closes_with_the_book_after_its_closing_message() -> None:
    # The closing trade's own message clears the ask: that is inside the bar.
    recs = [
        snap(SYM, T0, 1, bid_px=10.0, ask_px=10.5),
        trade(SYM, T0 + S, 2, 10.5, 1.0),
        trade(SYM, T0 + 3 * S, 3, 10.5, 1.0, ask_px=None),
        tick(SYM, T0 + 4 * S, 9, ask_px=10.75),  # a gap after the bar: not inside it
    ]
    bars, _ = run_engine(recs, specs=("trades:2",), lateness_ns=0)
    (bar,) = bars
    assert (bar.bid_close, bar.ask_close, bar.spread_close) == (10.0, None, None)
    assert (bar.start, bar.end, bar.messages, bar.gaps, bar.complete) == (T0 + S, T0 + 3 * S, 2, 0, True)
    assert (bar.spread_mean, bar.spread_min, bar.spread_max) == (0.5, 0.5, 0.5)


def test_an_event_bar_whose_window_is_all_undefined_has_no_spread_statistics() -> None:
    # The first trade's message is a gap: the spread in effect at that trade was the
    # live 0.5, but over the bar's window [1 s, 3 s) the book was resyncing. Only a
    # zero-length window falls back to the spread at the first trade.
    recs = [
        snap(SYM, T0, 1, bid_px=10.0, ask_px=10.5),
        trade(SYM, T0 + S, 5, 10.5, 1.0),
        trade(SYM, T0 + 3 * S, 6, 10.5, 1.0),
        trade(SYM, T0 + 3 * S, 7, 10.5, 1.0),
    ]
    bars, _ = run_engine(recs, specs=("trades:2",), lateness_ns=0)
    assert [(b.spread_mean, b.spread_min, b.spread_max, b.complete) for b in bars] == [
        (None, None, None, True),
        (None, None, None, False),  # zero-length window: the spread at its first trade (undefined)
    ]


def test_an_incomplete_event_bar_integrates_up_to_the_last_event_time() -> None:
    # Open at the end of input: the window runs from its first trade to the last event
    # time seen (another symbol's clock here), like an incomplete time bar.
    recs = [
        snap(SYM, T0, 1, bid_px=10.0, ask_px=10.5),
        trade(SYM, T0 + S, 2, 10.5, 1.0),
        tick(SYM, T0 + 2 * S, 3, ask_px=11.0),  # spread 1.0 from 2 s
        trade(OTHER, T0 + 5 * S, 1, 7.0, 1.0),  # the stream's clock reaches 5 s
    ]
    bars, _ = run_engine(recs, specs=("trades:2",), lateness_ns=0)
    (bar,) = [b for b in bars if b.symbol == SYM]
    assert (bar.start, bar.end, bar.complete, bar.messages) == (T0 + S, T0 + S, False, 2)
    # 0.5 over [1 s, 2 s), 1.0 over [2 s, 5 s): (0.5 + 3.0) / 4.
    assert (bar.spread_mean, bar.spread_min, bar.spread_max) == (3.5 / 4, 0.5, 1.0)
    assert (bar.ask_close, bar.spread_close) == (11.0, 1.0)
