"""Trade signing and the ``signed`` group, against the Lee--Ready rule.

Source: Lee, C. M. C. & Ready, M. J. (1991), "Inferring Trade Direction from Intraday
Data", Journal of Finance 46(2) (from memory, see REFERENCES.md): a trade above the
prevailing midpoint is a buy, below it a sell; at the midpoint the tick test decides
(uptick or zero-uptick: buy; downtick or zero-downtick: sell); with no quote the tick
test alone. Every expected sign below is worked by hand from that rule.
"""

from __future__ import annotations

from typing import Any

import pytest
from factories import T0, S, feeds, run_engine, snap, tick, trade
from hypothesis import given, settings

from barsmith.bars.spec import parse_specs
from barsmith.book.book import SymbolBook
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.ingest.ticks import decode_tick

SYM = "QUILLBERRY.ZNV"
QUOTE = {"bid_px": 10.00, "bid_qty": 5.0, "ask_px": 10.10, "ask_qty": 5.0}  # mid 10.05


def live_book() -> SymbolBook:
    book = SymbolBook(SYM)
    message = decode_tick(snap(SYM, T0, 1, **QUOTE))
    book.apply(message, book.admit(message))
    return book


@pytest.mark.parametrize(
    ("earlier", "px", "sign"),
    [
        ([], 10.10, 1),  # above the mid: quote rule, buy
        ([], 10.07, 1),  # above the mid, inside the spread
        ([], 10.00, -1),  # below the mid: quote rule, sell
        ([10.00], 10.05, 1),  # at the mid after a lower trade: uptick, buy
        ([10.10], 10.05, -1),  # at the mid after a higher trade: downtick, sell
        ([10.00, 10.05], 10.05, 1),  # at the mid, same price as an uptick: zero-uptick, buy
        ([10.10, 10.05], 10.05, -1),  # at the mid, same price as a downtick: zero-downtick, sell
        ([10.05, 10.00, 10.05, 10.05], 10.05, 1),  # zero ticks look back to the last change (up)
        ([10.05], 10.05, 0),  # at the mid, no earlier different price: not signable
        ([], 10.05, 0),  # at the mid, first trade ever: not signable
    ],
)
def test_lee_ready_textbook_cases(earlier: list[float], px: float, sign: int) -> None:
    book = live_book()
    for price in earlier:
        book.sign_trade(price)
    assert book.sign_trade(px) == sign


@pytest.mark.parametrize(
    ("earlier", "px", "sign"),
    [
        ([], 10.10, 0),  # no quote and no earlier trade: unsigned
        ([10.00], 10.10, 1),  # no quote: tick test alone, uptick
        ([10.20], 10.10, -1),  # downtick
        ([10.00, 10.10], 10.10, 1),  # zero-uptick
        ([10.20, 10.10], 10.10, -1),  # zero-downtick
    ],
)
def test_without_a_valid_quote_the_tick_test_alone(earlier: list[float], px: float, sign: int) -> None:
    no_quote = SymbolBook(SYM)  # never had a snapshot: not live
    crossed = live_book()
    crossed.bid_px, crossed.ask_px = 10.20, 10.00  # crossed: not a valid quote
    one_sided = live_book()
    one_sided.ask_px = None
    for book in (no_quote, crossed, one_sided):
        for price in earlier:
            book.sign_trade(price)
        assert book.sign_trade(px) == sign


def signed_bars(records: list[dict[str, Any]], spec: str = "trades:1@signed") -> list[tuple[int, int, float]]:
    bars, _ = run_engine(records, specs=(spec,))
    return [(b.buy_trades, b.sell_trades, b.unsigned_volume) for b in bars]


def test_a_trade_is_signed_against_the_quote_before_its_own_message() -> None:
    # The message that carries the trade at 10.08 also moves the quote to 10.06 / 10.12
    # (mid 10.09): against that it would be a sell; against the prevailing mid 10.05 it
    # is a buy (Lee & Ready 1991: the quote in effect when the trade happened).
    recs = [
        snap(SYM, T0, 1, **QUOTE),
        trade(SYM, T0 + S, 2, 10.08, 1.0, bid_px=10.06, ask_px=10.12),
        trade(SYM, T0 + 2 * S, 3, 10.08, 2.0),  # now below the mid 10.09: a sell
    ]
    assert signed_bars(recs) == [(1, 0, 0.0), (0, 1, 0.0)]


def test_the_group_sums_buy_sell_and_unsigned_volume() -> None:
    recs = [
        trade(SYM, T0, 1, 10.05, 1.0),  # no quote, first trade: unsigned
        snap(SYM, T0 + S, 2, **QUOTE),
        trade(SYM, T0 + 2 * S, 3, 10.10, 2.0),  # above the mid: buy
        trade(SYM, T0 + 3 * S, 4, 10.00, 3.0),  # below: sell
        trade(SYM, T0 + 4 * S, 5, 10.05, 4.0),  # at the mid after 10.00: uptick, buy
        tick(SYM, T0 + 5 * S, 7, bid_px=10.01),  # a gap: not live, so the tick test alone
        trade(SYM, T0 + 6 * S, 8, 10.05, 5.0),  # zero-uptick: buy
        trade(SYM, T0 + 7 * S, 9, 10.04, 6.0),  # downtick: sell
    ]
    (bar,) = run_engine(recs, specs=("time:1m@signed",))[0]
    assert (bar.buy_volume, bar.sell_volume, bar.unsigned_volume) == (11.0, 9.0, 1.0)
    assert (bar.buy_trades, bar.sell_trades, bar.trades) == (3, 2, 6)


def test_the_tick_test_state_outlives_bars_and_checkpoints() -> None:
    specs = parse_specs(["trades:1@signed"])
    first = [trade(SYM, T0, 1, 10.00, 1.0), trade(SYM, T0 + S, 2, 10.05, 1.0)]  # no quote: up
    engine = Engine(specs, 0)
    engine.process(first, [0, 1], "t")
    assert [b.buy_trades for b in engine.take_bars()] == [0, 1]  # unsigned, then an uptick
    restored, _ = decode_checkpoint(encode_checkpoint(engine), specs, 0)
    restored.process([trade(SYM, T0 + 2 * S, 3, 10.05, 1.0)], [2], "t")  # zero-uptick
    restored.finish()
    assert [(b.buy_trades, b.unsigned_volume) for b in restored.take_bars()] == [(1, 0.0)]


def test_bars_without_the_group_do_not_sign() -> None:
    _, engine = run_engine([trade(SYM, T0, 1, 10.0, 1.0), trade(SYM, T0 + S, 2, 10.5, 1.0)], specs=("time:1m",))
    book = engine.book(SYM)
    assert book is not None and book.last_trade_px is None and book.tick_dir == 0


@settings(max_examples=60, deadline=None)
@given(feeds())
def test_signed_volume_adds_up_to_the_bar_volume(recs: list[dict[str, Any]]) -> None:
    bars, _ = run_engine(recs, specs=("time:1m@signed", "trades:3@signed"))
    for bar in bars:
        assert bar.buy_volume + bar.sell_volume + bar.unsigned_volume == pytest.approx(bar.volume)
        assert bar.buy_trades + bar.sell_trades <= bar.trades
