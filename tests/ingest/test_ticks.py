"""Wire-format validation: each malformation has its own reason."""

from __future__ import annotations

import math
from typing import Any

import pytest
from factories import T0, tick

from barsmith.ingest.ticks import ASK_PX, BID_PX, BID_QTY, MalformedTickError, RejectReason, decode_tick


def reason_of(rec: Any) -> RejectReason:
    with pytest.raises(MalformedTickError) as info:
        decode_tick(rec)
    return info.value.reason


def test_valid_delta_with_quotes_and_trade() -> None:
    t = decode_tick(tick(bid_px=10.0, bid_qty=3, ask_px=None, trade_px=10.0, trade_qty=2))
    assert (t.sym, t.ts, t.seq, t.is_snapshot) == ("FENWORTH~KESMOOR", T0, 1, False)
    assert t.present == BID_PX | BID_QTY | ASK_PX
    assert t.bid_qty == 3.0 and isinstance(t.bid_qty, float)
    assert t.ask_px is None
    assert (t.trade_px, t.trade_qty) == (10.0, 2.0)


def test_unknown_keys_are_ignored() -> None:
    t = decode_tick(tick(levels=[[1, 2]], venue_flags="x"))
    assert t.present == 0


@pytest.mark.parametrize(
    ("rec", "reason"),
    [
        ([1, 2], RejectReason.NOT_A_MAP),
        ("hello", RejectReason.NOT_A_MAP),
        ({"ts": T0, "seq": 1, "kind": "delta"}, RejectReason.MISSING_FIELD),
        (tick(ts="2027-01-01"), RejectReason.WRONG_TYPE),
        (tick(ts=True), RejectReason.WRONG_TYPE),  # a bool is not an integer here
        (tick(seq=1.0), RejectReason.WRONG_TYPE),
        (tick(ts=0), RejectReason.BAD_VALUE),
        (tick(seq=-1), RejectReason.BAD_VALUE),
        (tick(ts=2**63), RejectReason.BAD_VALUE),
        (tick(sym=""), RejectReason.BAD_VALUE),
        (tick(sym="A" * 65), RejectReason.BAD_VALUE),
        (tick(sym="BAD\nSYM"), RejectReason.BAD_VALUE),
        (tick(sym=42), RejectReason.WRONG_TYPE),
        (tick(kind="refresh"), RejectReason.UNKNOWN_KIND),
        (tick(kind=1), RejectReason.WRONG_TYPE),
        (tick(bid_px=0.0), RejectReason.BAD_VALUE),
        (tick(bid_px=-1.0), RejectReason.BAD_VALUE),
        (tick(ask_px=math.inf), RejectReason.BAD_VALUE),
        (tick(ask_qty=math.nan), RejectReason.BAD_VALUE),
        (tick(bid_qty=-0.5), RejectReason.BAD_VALUE),
        (tick(bid_px="10"), RejectReason.WRONG_TYPE),
        (tick(trade_px=10.0), RejectReason.HALF_TRADE),
        (tick(trade_qty=1.0), RejectReason.HALF_TRADE),
        (tick(trade_px=10.0, trade_qty=0.0), RejectReason.BAD_VALUE),
        (tick(trade_px=0.0, trade_qty=1.0), RejectReason.BAD_VALUE),
    ],
)
def test_malformed_records_have_a_reason(rec: Any, reason: RejectReason) -> None:
    assert reason_of(rec) is reason


def test_valid_tick_round_trips_through_its_wire_form() -> None:
    rec = tick(sym="NEWSYM~KESMOOR", bid_px=1.5, bid_qty=0.0, ask_px=2.0, ask_qty=3.0, trade_px=2.0, trade_qty=1.0)
    assert decode_tick(dict(rec)).to_wire() == rec


def test_zero_quantity_at_best_is_valid() -> None:
    assert decode_tick(tick(bid_qty=0.0)).bid_qty == 0.0
