"""Depth books: levels in, the top of book out; the book forms never mix; limits hold."""

from __future__ import annotations

import random
from typing import Any

import pytest
from factories import T0, S, run_engine, snap, tick, trade
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.bars.family import SpecContext
from barsmith.bars.group import StatOptions
from barsmith.bars.spec import parse_specs
from barsmith.book.book import SymbolBook
from barsmith.book.depth import Ladder
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.ingest.eventtime import StreamLimits
from barsmith.ingest.ticks import MalformedTickError, RejectReason, decode_tick

SYM = "GORSEWATER.ZNV"
PRICES = st.integers(90, 110).map(lambda n: n * 0.5)
LEVELS = st.lists(st.tuples(PRICES, st.sampled_from([0.0, 0.0, 1.0, 2.5, 7.0])), max_size=6, unique_by=lambda x: x[0])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.booleans(), LEVELS, LEVELS), min_size=1, max_size=40))
def test_the_top_of_book_is_a_brute_force_rebuild_of_the_level_history(
    messages: list[tuple[bool, list[tuple[float, float]], list[tuple[float, float]]]],
) -> None:
    book = SymbolBook(SYM)
    model: dict[str, dict[float, float]] = {"bids": {}, "asks": {}}
    for seq, (is_snapshot, bids, asks) in enumerate(messages, start=1):
        if is_snapshot:
            bids = [(px, qty) for px, qty in bids if qty > 0]
            asks = [(px, qty) for px, qty in asks if qty > 0]
            record = snap(SYM, T0 + seq, seq, bids=[list(x) for x in bids], asks=[list(x) for x in asks])
        else:
            record = tick(SYM, T0 + seq, seq, bids=[list(x) for x in bids], asks=[list(x) for x in asks])
        message = decode_tick(record)
        book.apply(message, book.admit(message))
        if is_snapshot or book.is_live:  # a delta before the first snapshot is not applied
            for side, levels in (("bids", bids), ("asks", asks)):
                if is_snapshot:
                    model[side] = {}
                for px, qty in levels:
                    model[side][px] = qty
                model[side] = {px: q for px, q in model[side].items() if q > 0}  # qty 0 removes
        if not book.is_live:
            continue
        # Brute force: the whole history replayed into a map, then max / min.
        best_bid = max(model["bids"], default=None)
        best_ask = min(model["asks"], default=None)
        assert (book.bid_px, book.ask_px) == (best_bid, best_ask)
        assert book.bid_qty == (model["bids"][best_bid] if best_bid is not None else None)
        assert book.ask_qty == (model["asks"][best_ask] if best_ask is not None else None)
        for side, ladder in (("bids", book.bids), ("asks", book.asks)):
            assert ladder.levels() == sorted(model[side].items()) and len(ladder) == len(model[side])
            assert all(qty > 0 for _, qty in ladder.levels())  # random deltas never leave a level <= 0


def test_the_best_levels_and_their_sums() -> None:
    bids = Ladder(True)
    for px, qty in ((10.0, 1.0), (9.5, 2.0), (9.0, 4.0), (10.0, 3.0), (8.5, 8.0), (9.5, 0.0)):
        bids.set(px, qty)
    assert bids.levels() == [(8.5, 8.0), (9.0, 4.0), (10.0, 3.0)] and bids.best() == 10.0 and bids.best_qty() == 3.0
    assert (bids.top_qty(2), bids.top_qty(5)) == (7.0, 15.0)
    assert bids.size_after([(7.0, 1.0), (10.0, 0.0), (11.0, 0.0)]) == 3


OPS = st.lists(
    st.tuples(st.integers(1, 400).map(lambda n: n * 0.25), st.sampled_from([0.0, 0.0, 1.0, 3.0, 0.5])),
    max_size=300,
)


@settings(max_examples=150, deadline=None)
@given(st.booleans(), st.lists(st.tuples(PRICES, st.sampled_from([1.0, 2.0]))), OPS, st.integers(1, 12))
def test_a_ladder_is_a_sorted_map_of_its_levels(
    descending: bool, start: list[tuple[float, float]], ops: list[tuple[float, float]], n: int
) -> None:
    """Random level changes against a plain dict (the brute force): every read agrees."""
    ladder = Ladder(descending)
    model = dict(start)
    ladder.replace(list(model.items()))
    for px, qty in ops:
        ladder.set(px, qty)
        if qty > 0:
            model[px] = qty
        else:
            model.pop(px, None)
        best_first = sorted(model, reverse=descending)
        assert ladder.best() == (best_first[0] if best_first else None)
        assert ladder.best_qty() == (model[best_first[0]] if best_first else None)
        assert ladder.top_qty(n) == sum(model[px] for px in best_first[:n])  # summed best first, as the ladder
    assert ladder.levels() == sorted(model.items()) and len(ladder) == len(model)
    removals = [(px, 0.0) for px in list(model)[:3]]
    assert ladder.size_after([*removals, (1e6, 1.0)]) == len(model) - len(removals) + 1


def test_adding_or_removing_a_level_walks_o_log_levels() -> None:
    """The cost of a level change is the links its walk follows (not a timing): the mean
    over every level of a side grows with log(levels), far from the x256 of a shift."""
    rng = random.Random(11)

    def mean_steps(size: int) -> float:
        ladder = Ladder(True)
        prices = [100.0 + i * 0.01 for i in range(size)]
        rng.shuffle(prices)
        for px in prices:
            ladder.set(px, 1.0)
        return sum(ladder.search_steps(px) for px in prices) / size

    small, large = mean_steps(64), mean_steps(64 * 256)
    # A skip list with towers growing at 1/4 walks about 4·log4(levels) links: ~12 and ~28 here.
    assert large < 3.5 * small, (small, large)
    snapshot = Ladder(False)  # a side built whole, as a snapshot builds it
    snapshot.replace([(100.0 + i, 1.0) for i in range(64 * 256)])
    assert sum(snapshot.search_steps(100.0 + i) for i in range(0, 64 * 256, 16)) / 1024 < 3.5 * small
    ladder = Ladder(False)
    for i in range(5000):
        ladder.set(100.0 + i, 1.0)  # prices in order: the worst case for a structure that balances by price
    for i in range(0, 5000, 2):
        ladder.set(100.0 + i, 0.0)
    assert ladder.best() == 101.0 and len(ladder) == 2500 and ladder.search_steps(5099.0) < 60


@pytest.mark.parametrize(
    ("fields", "reason"),
    [
        ({"bids": [[10.0, 1.0]], "bid_px": 10.0}, RejectReason.MIXED_BOOK),
        ({"asks": [[10.0, 1.0]], "bid_qty": 3.0}, RejectReason.MIXED_BOOK),
        ({"bids": [[10.0, 1.0], [10.0, 2.0]]}, RejectReason.BAD_VALUE),
        ({"bids": [[10.0, -1.0]]}, RejectReason.BAD_VALUE),
        ({"bids": [[0.0, 1.0]]}, RejectReason.BAD_VALUE),
        ({"bids": [10.0, 1.0]}, RejectReason.WRONG_TYPE),
        ({"asks": {"10": 1}}, RejectReason.WRONG_TYPE),
    ],
)
def test_bad_levels_are_rejected_with_a_reason(fields: dict[str, Any], reason: RejectReason) -> None:
    with pytest.raises(MalformedTickError) as caught:
        decode_tick(tick(SYM, T0, 1, **fields))
    assert caught.value.reason is reason


def depth_feed() -> list[dict[str, Any]]:
    return [
        snap(SYM, T0, 1, bids=[[10.0, 2.0], [9.9, 3.0], [9.8, 5.0]], asks=[[10.1, 1.0], [10.2, 4.0]]),
        tick(SYM, T0 + 10 * S, 2, bids=[[10.0, 0.0]]),  # the best bid goes: 9.9 x 3
        trade(SYM, T0 + 20 * S, 3, 10.1, 1.0, asks=[[10.1, 0.0], [10.3, 6.0]]),  # the best ask goes: 10.2 x 4
        tick(SYM, T0 + 30 * S, 4, bids=[[10.2, 1.0]]),  # locked: bid 10.2 = ask 10.2
        tick(SYM, T0 + 40 * S, 5, bids=[[10.25, 1.0]]),  # crossed
        tick(SYM, T0 + 50 * S, 6, bids=[[10.25, 0.0], [10.2, 0.0]]),  # back: 9.9 / 10.2
        trade(SYM, T0 + 62 * S, 7, 10.2, 1.0),  # the next bar: the first is complete
        tick(SYM, T0 + 65 * S, 8, bid_px=9.0),  # top-of-book fields for a depth symbol
        tick(SYM, T0 + 70 * S, 8, asks=[[11.0 + i / 10, 1.0] for i in range(4)]),  # 2 + 4 > 5 levels
    ]


def test_a_depth_feed_gives_the_top_of_book_statistics() -> None:
    specs = parse_specs(["time:1m@spread,depth,crossing"], context=SpecContext(statistics=StatOptions(depth_levels=2)))
    engine = Engine(specs, 0, StreamLimits(max_depth_levels=5))
    records = depth_feed()
    engine.process(records, list(range(len(records))), "t")
    engine.finish()
    first = engine.take_bars()[0]
    assert (first.bid_close, first.ask_close) == (9.9, 10.2)
    assert (first.crossed_messages, first.locked_messages) == (1, 1)
    # Best two levels, time-weighted over [0 s, 60 s) (hand-worked):
    # bids 2+3 for 10 s, 3+5 for 20 s, 1+3 (10.2, 9.9) for 10 s, 1+1 for 10 s, 3+5 for 10 s;
    # asks 1+4 for 20 s, then 4+6 for 40 s.
    assert first.bid_qty_mean == pytest.approx((10 * 5 + 20 * 8 + 10 * 4 + 10 * 2 + 10 * 8) / 60)
    assert first.ask_qty_mean == pytest.approx((20 * 5 + 40 * 10) / 60)
    reasons = [r.reason for r in engine.take_rejects()]
    assert reasons == [RejectReason.MIXED_BOOK, RejectReason.TOO_MANY_LEVELS]
    assert engine.stats.rejected["mixed_book"] == 1 and engine.stats.rejected["too_many_levels"] == 1


def test_levels_for_a_top_of_book_symbol_are_refused() -> None:
    recs = [snap(SYM, T0, 1, bid_px=10.0, ask_px=10.2), tick(SYM, T0 + S, 2, bids=[[10.1, 1.0]])]
    _, engine = run_engine(recs)
    assert engine.stats.rejected["mixed_book"] == 1
    book = engine.book(SYM)
    assert book is not None and not book.depth and book.bid_px == 10.0


def test_a_snapshot_beyond_the_level_limit_is_refused() -> None:
    recs = [snap(SYM, T0, 1, bids=[[10.0 - i / 10, 1.0] for i in range(3)])]
    _, engine = run_engine(recs, limits=StreamLimits(max_depth_levels=2))
    assert engine.stats.rejected["too_many_levels"] == 1 and engine.stats.accepted == 0


def test_depth_books_survive_checkpoints() -> None:
    specs = parse_specs(["time:1m@all"])
    records = depth_feed()
    whole = Engine(specs, 0, StreamLimits(max_depth_levels=5))
    whole.process(records, list(range(len(records))), "t")
    expected = whole.take_bars()
    whole.finish()
    expected += whole.take_bars()
    first = Engine(specs, 0, StreamLimits(max_depth_levels=5))
    first.process(records[:5], list(range(5)), "t")
    got = first.take_bars()
    first.take_rejects()
    second, _ = decode_checkpoint(encode_checkpoint(first), specs, 0, StreamLimits(max_depth_levels=5))
    book = second.book(SYM)
    assert book is not None and book.depth and [px for px, _ in book.bids.levels()] == [9.8, 9.9, 10.2, 10.25]
    second.process(records[5:], list(range(5, len(records))), "t")
    second.finish()
    got += second.take_bars()
    assert got == expected


def test_a_depth_record_is_one_clean_record_and_a_map_inside_levels_is_not() -> None:
    from barsmith.ingest.framing import _clean_tick

    good = snap(SYM, T0, 1, bids=[[10.0, 1.0]], asks=[[10.5, 2.0]])
    assert _clean_tick(good) is not None
    hostile = snap(SYM, T0, 1, bids=[[10.0, {"sym": SYM, "ts": T0, "seq": 2, "kind": "delta"}]])
    assert _clean_tick(hostile) is None  # levels hold numbers only: this one is searched as a value
    _, engine = run_engine([good, tick(SYM, T0 + S, 2, asks=[[10.5, 0.0]])], specs=("time:1m@depth",))
    book = engine.book(SYM)
    assert book is not None and (book.bid_px, book.ask_px, book.bid_qty) == (10.0, None, 1.0)
