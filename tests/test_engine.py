"""The engine's bar rules (README, "Bars"): each case worked by hand."""

from __future__ import annotations

import pytest
from factories import MS, T0, S, run_engine, snap, tick, trade

from barsmith.ingest.ticks import RejectReason

SYM = "FENWORTH~KESMOOR"
M = 60 * S


def quotes(bid: float, ask: float) -> dict[str, float]:
    return {"bid_px": bid, "bid_qty": 1.0, "ask_px": ask, "ask_qty": 1.0}


def test_tick_exactly_at_interval_end_goes_to_next_bar() -> None:
    bars, _ = run_engine([trade(SYM, T0 + 10 * S, 1, 10.0, 1.0), trade(SYM, T0 + M, 2, 11.0, 2.0)])
    assert [(b.start, b.end, b.open, b.volume) for b in bars] == [
        (T0, T0 + M, 10.0, 1.0),
        (T0 + M, T0 + 2 * M, 11.0, 2.0),
    ]
    assert bars[0].complete and not bars[1].complete  # the last one only closed because input ended


def test_ohlc_volume_notional_vwap_of_a_time_bar() -> None:
    recs = [trade(SYM, T0 + i * S, i + 1, px, qty) for i, (px, qty) in enumerate([(10, 1), (12, 3), (9, 2), (11, 4)])]
    (bar,) = run_engine(recs)[0]
    assert (bar.open, bar.high, bar.low, bar.close) == (10, 12, 9, 11)
    assert bar.volume == 10 and bar.notional == 10 + 36 + 18 + 44
    assert bar.vwap == pytest.approx(108 / 10)
    assert bar.trades == 4 and bar.messages == 4


def test_quote_only_interval_gives_a_bar_with_null_ohlc() -> None:
    bars, _ = run_engine([snap(SYM, T0 + S, 1, **quotes(10.0, 10.5)), tick(SYM, T0 + 2 * S, 2, bid_qty=3.0)])
    (bar,) = bars
    assert bar.open is None and bar.high is None and bar.low is None and bar.close is None
    assert bar.volume == 0 and bar.notional == 0 and bar.vwap is None and bar.trades == 0
    assert bar.messages == 2
    assert (bar.bid_close, bar.ask_close, bar.spread_close) == (10.0, 10.5, 0.5)


def test_quote_and_trade_in_one_message_trade_happens_first() -> None:
    # The trade at 10.5 lifts the ask; the same message moves the ask to 10.75.
    recs = [
        snap(SYM, T0, 1, **quotes(10.0, 10.5)),
        trade(SYM, T0 + 30 * S, 2, 10.5, 5.0, ask_px=10.75),
    ]
    bars, _ = run_engine(recs, specs=("time:1m", "trades:1"))
    tick_bar = next(b for b in bars if b.spec == "trades:1")
    # Spread in effect at the trade was 0.5 (before the quote change); the bar's
    # close state is after the message's quote change.
    assert tick_bar.spread_mean == 0.5
    assert tick_bar.ask_close == 10.75 and tick_bar.spread_close == 0.75
    time_bar = next(b for b in bars if b.spec == "time:1m")
    assert time_bar.close == 10.5 and time_bar.ask_close == 10.75


def test_carried_in_spread_is_time_weighted_over_the_interval() -> None:
    # Spread 0.5 set in the previous minute; in this minute it is 0.5 for 15 s,
    # then 0.25 for 45 s: mean (0.5*15 + 0.25*45) / 60 = 0.3125.
    recs = [
        snap(SYM, T0 + 50 * S, 1, **quotes(10.0, 10.5)),
        tick(SYM, T0 + M + 15 * S, 2, ask_px=10.25),
        tick(SYM, T0 + 2 * M + 1, 3, bid_qty=2.0),  # moves event time past the bar
    ]
    bars, _ = run_engine(recs)
    bar = next(b for b in bars if b.start == T0 + M)
    assert bar.spread_mean == pytest.approx(0.3125)
    assert (bar.spread_min, bar.spread_max) == (0.25, 0.5)
    assert bar.complete


def test_undefined_and_zero_length_states_are_left_out() -> None:
    recs = [
        snap(SYM, T0, 1, **quotes(10.0, 10.5)),
        tick(SYM, T0 + 10 * S, 2, ask_px=None),  # one side empty: undefined for 10 s
        tick(SYM, T0 + 20 * S, 3, ask_px=11.0),  # spread 1.0 ...
        tick(SYM, T0 + 20 * S, 4, ask_px=10.25),  # ... for zero time, then 0.25
        tick(SYM, T0 + M, 5, bid_qty=2.0),
    ]
    bar = run_engine(recs)[0][0]
    # 0.5 for 10 s, undefined 10 s, 1.0 for 0 s (left out), 0.25 for 40 s.
    assert bar.spread_mean == pytest.approx((0.5 * 10 + 0.25 * 40) / 50)
    assert (bar.spread_min, bar.spread_max) == (0.25, 0.5)


def test_equal_timestamps_keep_message_order() -> None:
    recs = [trade(SYM, T0, 1, 10.0, 1.0), trade(SYM, T0, 2, 11.0, 1.0), trade(SYM, T0, 3, 9.5, 1.0)]
    bar = run_engine(recs)[0][0]
    assert (bar.open, bar.close, bar.high, bar.low) == (10.0, 9.5, 11.0, 9.5)


def test_gaps_and_messages_are_counted_per_bar() -> None:
    recs = [snap(SYM, T0, 1, **quotes(1.0, 2.0)), tick(SYM, T0 + S, 5, bid_qty=1.0), tick(SYM, T0 + 2 * S, 6)]
    bar = run_engine(recs)[0][0]
    assert bar.gaps == 1 and bar.messages == 3
    assert bar.bid_close is None and bar.spread_close is None  # resyncing after the gap


def test_duplicates_are_not_in_bars() -> None:
    recs = [trade(SYM, T0, 1, 10.0, 1.0), trade(SYM, T0 + S, 1, 10.0, 1.0)]
    bars, engine = run_engine(recs)
    assert bars[0].volume == 1.0 and bars[0].messages == 1
    assert engine.stats.duplicates == 1


def test_snapshot_trade_fields_do_not_count_as_a_trade() -> None:
    bar = run_engine([snap(SYM, T0, 1, trade_px=10.0, trade_qty=5.0, **quotes(9.0, 11.0))])[0][0]
    assert bar.trades == 0 and bar.volume == 0


def test_trade_counts_while_resyncing() -> None:
    bar = run_engine([trade(SYM, T0, 7, 10.0, 3.0)])[0][0]
    assert bar.volume == 3.0 and bar.spread_mean is None


def test_time_bar_closes_when_watermark_minus_lateness_reaches_end() -> None:
    recs = [trade(SYM, T0 + S, 1, 10.0, 1.0), trade("MARROWAY~KESMOOR", T0 + M + 1999 * MS, 1, 5.0, 1.0)]
    bars, _ = run_engine(recs, lateness_ns=2 * S, finish=False)
    assert bars == []  # watermark - lateness = T0 + M - 1 ms < end
    recs.append(trade("MARROWAY~KESMOOR", T0 + M + 2 * S, 2, 5.0, 1.0))
    bars, _ = run_engine(recs, lateness_ns=2 * S, finish=False)
    assert [(b.symbol, b.start) for b in bars] == [(SYM, T0)]


def test_late_message_is_recorded_and_still_updates_book_and_event_bars() -> None:
    recs = [
        snap(SYM, T0, 1, **quotes(10.0, 10.5)),
        trade("MARROWAY~KESMOOR", T0 + 2 * M, 1, 5.0, 1.0),  # closes SYM's first minute
        trade(SYM, T0 + 30 * S, 2, 10.5, 4.0, ask_px=10.25),  # late for time:1m
    ]
    bars, engine = run_engine(recs, specs=("time:1m", "volume:4"), lateness_ns=0)
    first = next(b for b in bars if b.symbol == SYM and b.spec == "time:1m")
    assert first.trades == 0 and first.messages == 1  # the late trade is not in it
    assert engine.stats.late == 1
    (late,) = engine.take_rejects()
    assert late.reason is RejectReason.LATE and late.symbol == SYM and late.seq == 2
    volume_bar = next(b for b in bars if b.spec == "volume:4")
    assert volume_bar.volume == 4.0 and volume_bar.complete
    book = engine.book(SYM)
    assert book is not None and book.ask_px == 10.25


@pytest.mark.parametrize(
    ("spec", "trades", "expected"),
    [
        # Tick bars: every N trades (López de Prado 2018, ch. 2.3.1.2, from memory).
        ("trades:2", [(10, 1), (11, 1), (12, 1), (13, 1), (14, 1)], [(2, 2.0, True), (2, 2.0, True), (1, 1.0, False)]),
        # Volume bars: close at the first trade at which sum(qty) reaches Q; the whole
        # trade belongs to the bar, no splitting (ch. 2.3.1.3, from memory).
        ("volume:5", [(10, 2), (10, 2), (10, 3), (10, 5), (10, 1)], [(3, 7.0, True), (1, 5.0, True), (1, 1.0, False)]),
        # Notional ("dollar") bars: sum(px*qty) reaches X (ch. 2.3.1.4, from memory).
        ("notional:100", [(10, 4), (20, 3), (50, 1), (5, 1)], [(2, 7.0, True), (2, 2.0, False)]),
    ],
)
def test_event_bars_follow_their_definitions(
    spec: str, trades: list[tuple[float, float]], expected: list[tuple[int, float, bool]]
) -> None:
    recs = [trade(SYM, T0 + i * S, i + 1, px, qty) for i, (px, qty) in enumerate(trades)]
    bars, _ = run_engine(recs, specs=(spec,))
    assert [(b.trades, b.volume, b.complete) for b in bars] == expected
    # start = ts of the first trade, end = ts of the closing (or last) trade.
    first = bars[0]
    assert first.start == T0 and first.end == T0 + (expected[0][0] - 1) * S


def test_event_bar_messages_span_first_to_closing_trade() -> None:
    recs = [
        tick(SYM, T0, 1, bid_qty=1.0),  # before any trade: in no event bar
        trade(SYM, T0 + S, 2, 10.0, 1.0),
        tick(SYM, T0 + 2 * S, 3, bid_qty=2.0),
        trade(SYM, T0 + 3 * S, 4, 10.0, 1.0),
    ]
    (bar,) = run_engine(recs, specs=("trades:2",))[0]
    assert bar.messages == 3 and bar.start == T0 + S and bar.end == T0 + 3 * S


def test_decimal_volumes_reach_their_threshold() -> None:
    # 0.1 + 0.2 is 0.30000000000000004 in binary; ten trades of 0.1 sum to 0.9999999999999999.
    recs = [trade(SYM, T0 + i, i + 1, 10.0, 0.1) for i in range(10)]
    bars, _ = run_engine(recs, specs=("volume:1",))
    assert bars[0].trades == 10 and bars[0].complete


def test_malformed_record_does_not_disturb_other_symbols() -> None:
    recs = [trade(SYM, T0, 1, 10.0, 1.0), {"sym": SYM, "ts": "bad"}, trade(SYM, T0 + S, 2, 11.0, 1.0)]
    bars, engine = run_engine(recs)
    assert bars[0].trades == 2 and bars[0].gaps == 0
    assert engine.stats.rejected == {"wrong_type": 1}
    (reject,) = engine.take_rejects()
    assert reject.position == 1 and reject.symbol == SYM


def test_batched_records_are_flattened_in_order() -> None:
    recs = [[trade(SYM, T0, 1, 10.0, 1.0), trade(SYM, T0 + S, 2, 11.0, 1.0)]]
    bar = run_engine(recs)[0][0]
    assert (bar.open, bar.close, bar.trades) == (10.0, 11.0, 2)
