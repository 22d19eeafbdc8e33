"""Microstructure statistics (groups mid, cost, depth, flow, rv) on hand-worked feeds.

Sources (REFERENCES.md; definitions quoted from memory):
* effective spread 2·|p - m| against the prevailing midpoint m, relative: divided by m --
  SEC Rule 605 (17 CFR 242.605) and Hasbrouck (2007);
* relative quoted spread 10,000·(ask - bid)/mid, time-weighted -- common practice;
* size-weighted mid ("microprice", simple form) (b·qa + a·qb)/(qb + qa) -- common
  practice (Stoikov 2018 defines a refined version);
* order-flow imbalance e_n = 1{Pb_n ≥ Pb_n-1}·qb_n - 1{Pb_n ≤ Pb_n-1}·qb_n-1 -
  1{Pa_n ≤ Pa_n-1}·qa_n + 1{Pa_n ≥ Pa_n-1}·qa_n-1, summed over an interval -- Cont,
  Kukanov & Stoikov (2014), "The Price Impact of Order Book Events";
* realized variance: Σ squared log returns sampled at a fixed interval -- Andersen,
  Bollerslev, Diebold & Labys (2003).
"""

from __future__ import annotations

import math
from typing import Any

import pytest
from factories import T0, S, run_engine, snap, tick, trade

from barsmith.bars.family import SpecContext
from barsmith.bars.group import StatOptions
from barsmith.bars.spec import BarSpec, parse_specs
from barsmith.checkpoint import CheckpointError, decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.settings import load_settings

SYM = "TALLOWMERE.ZNV"


def quote_feed() -> list[dict[str, Any]]:
    return [
        snap(SYM, T0, 1, bid_px=10.0, bid_qty=4.0, ask_px=10.2, ask_qty=6.0),  # mid 10.1
        trade(SYM, T0 + 10 * S, 2, 10.2, 2.0),
        tick(SYM, T0 + 20 * S, 3, bid_px=10.1, bid_qty=2.0),  # mid 10.15
        trade(SYM, T0 + 40 * S, 4, 10.1, 3.0, ask_qty=1.0),  # the trade sees the quote before ask_qty=1
        tick(SYM, T0 + 65 * S, 5, bid_qty=3.0),  # the next bar: the first one is complete, [0 s, 60 s)
    ]


def test_cost_depth_and_mid_by_hand() -> None:
    bar = run_engine(quote_feed(), specs=("time:1m@mid,cost,depth",))[0][0]
    # Relative quoted spread, time-weighted over [0 s, 60 s): 0.2/10.1 for 20 s, 0.1/10.15 for 40 s.
    r1, r2 = 10_000 * 0.2 / 10.1, 10_000 * 0.1 / 10.15
    assert bar.rel_spread_bps_mean == pytest.approx((20 * r1 + 40 * r2) / 60)
    # Effective spread, volume-weighted: 2 at 2·|10.2 - 10.1|, 3 at 2·|10.1 - 10.15| (Rule 605).
    assert bar.effective_spread == pytest.approx((2 * 0.2 + 3 * 0.1) / 5)
    assert bar.effective_spread_bps == pytest.approx((2 * 10_000 * 0.2 / 10.1 + 3 * 10_000 * 0.1 / 10.15) / 5)
    # Resting size: bid 4 for 20 s then 2 for 40 s; ask 6 for 40 s then 1 for 20 s.
    assert bar.bid_qty_mean == pytest.approx((20 * 4 + 40 * 2) / 60)
    assert bar.ask_qty_mean == pytest.approx((40 * 6 + 20 * 1) / 60)
    assert bar.depth_imbalance_mean == pytest.approx((20 * (-2 / 10) + 20 * (-4 / 8) + 20 * (1 / 3)) / 60)
    assert (bar.mid_open, bar.mid_high, bar.mid_low, bar.mid_close) == pytest.approx((10.1, 10.15, 10.1, 10.15))
    # Microprice of the closing book: bid 10.1 x 2, ask 10.2 x 1.
    assert bar.microprice_close == pytest.approx((10.1 * 1 + 10.2 * 2) / 3)


def test_undefined_statistics_are_null() -> None:
    recs = [trade(SYM, T0, 1, 10.0, 1.0), tick(SYM, T0 + S, 2, bid_px=9.9, ask_px=10.1)]  # never live
    (bar,) = run_engine(recs, specs=("time:1m@all",))[0]
    for name in (
        "mid_open", "mid_high", "mid_low", "mid_close", "microprice_close", "rel_spread_bps_mean",
        "effective_spread", "effective_spread_bps", "bid_qty_mean", "ask_qty_mean", "depth_imbalance_mean",
        "ofi", "realized_var",
    ):  # fmt: skip
        assert bar.get(name) is None, name
    crossed = [snap(SYM, T0, 1, bid_px=10.2, bid_qty=1.0, ask_px=10.0, ask_qty=1.0), trade(SYM, T0 + S, 2, 10.1, 1.0)]
    (bar,) = run_engine(crossed, specs=("time:1m@mid,cost",))[0]
    assert bar.mid_close is None and bar.effective_spread is None  # a crossed book has no mid
    # No size on one side: no microprice, no imbalance; the bid size still has a mean.
    one_size = [snap(SYM, T0, 1, bid_px=10.0, bid_qty=3.0, ask_px=10.2)]
    (bar,) = run_engine(one_size, specs=("time:1m@mid,depth",))[0]
    assert bar.microprice_close is None and bar.depth_imbalance_mean is None and bar.ask_qty_mean is None


def top(ts: int, seq: int, **fields: Any) -> dict[str, Any]:
    return tick(SYM, ts, seq, **fields)


def test_ofi_on_a_hand_worked_sequence() -> None:
    # Cont, Kukanov & Stoikov (2014), e_n per event, by hand:
    recs = [
        snap(SYM, T0, 1, bid_px=10.0, bid_qty=4.0, ask_px=10.2, ask_qty=6.0),  # no book before: no event
        top(T0 + 10 * S, 2, bid_qty=5.0),  # bid size up at the same price: +5 - 4 = +1
        top(T0 + 20 * S, 3, bid_px=10.1, bid_qty=2.0),  # bid price up: +qb_n = +2
        # next bar (its first message is an event of its own, against the book bar 1 closed with)
        top(T0 + 60 * S, 4, ask_px=10.15, ask_qty=3.0),  # ask price down: -qa_n = -3
        top(T0 + 70 * S, 5, bid_px=10.0, bid_qty=7.0),  # bid price down: -qb_n-1 = -2
        trade(SYM, T0 + 80 * S, 6, 10.1, 1.0),  # nothing changes: 0
        top(T0 + 90 * S, 7, ask_px=10.2, ask_qty=5.0),  # ask price up: +qa_n-1 = +3
        top(T0 + 125 * S, 9, bid_qty=1.0),  # a gap: resyncing, no event
        snap(SYM, T0 + 130 * S, 10, bid_px=10.0, bid_qty=1.0, ask_px=10.2, ask_qty=1.0),  # no live book before
    ]
    bars, _ = run_engine(recs, specs=("time:1m@flow",))
    assert [bar.ofi for bar in bars] == [1 + 2, -3 - 2 + 0 + 3, None]


def rv_specs(spec: str, sample_s: int) -> list[BarSpec]:
    return parse_specs([spec], context=SpecContext(statistics=StatOptions(sample_s * S)))


def run_specs(recs: list[dict[str, Any]], specs: list[BarSpec]) -> list[Any]:
    engine = Engine(specs, 0)
    engine.process(recs, list(range(len(recs))), "t")
    engine.finish()
    return engine.take_bars()


def test_realized_variance_by_hand() -> None:
    recs = [
        snap(SYM, T0, 1, bid_px=99.0, ask_px=101.0),  # mid 100
        top(T0 + 15 * S, 2, bid_px=100.0, ask_px=102.0),  # mid 101
        top(T0 + 30 * S, 3, bid_px=98.0, ask_px=100.0),  # mid 99, exactly at a sampling point
        top(T0 + 65 * S, 4, bid_px=99.0, ask_px=101.0),  # next bar
    ]
    # Every 10 s from the bar's start, and at its end: 100 100 101 99 99 99 | 99 (Andersen et al. 2003).
    bar = run_specs(recs, rv_specs("time:1m@rv", 10))[0]
    assert bar.realized_var == pytest.approx(math.log(101 / 100) ** 2 + math.log(99 / 101) ** 2)
    # Sampled every 40 s: 100 (0 s), 99 (40 s), 99 (end).
    bar = run_specs(recs, rv_specs("time:1m@rv", 40))[0]
    assert bar.realized_var == pytest.approx(math.log(99 / 100) ** 2)


def test_the_sampling_interval_is_a_setting_and_checkpoints_compare_it() -> None:
    settings = load_settings(bars=["time:1m@rv"], statistics={"rv_sample_ms": 250})
    (spec,) = settings.bar_specs()
    assert spec.group_labels == ["core", "rv(250ms)"]
    engine = Engine([spec], 0)
    with pytest.raises(CheckpointError, match=r"rv\(1s\)"):
        decode_checkpoint(encode_checkpoint(engine), parse_specs(["time:1m@rv"]), 0)


def test_all_carries_every_group_and_lean_bars_are_unchanged() -> None:
    full, _ = run_engine(quote_feed(), specs=("trades:1@all",))
    lean, _ = run_engine(quote_feed(), specs=("trades:1@core",))
    assert {"buy_volume", "ofi", "realized_var", "microprice_close", "spread_mean"} <= set(full[0].names)
    for small, big in zip(lean, full, strict=True):
        assert all(small.get(name) == big.get(name) for name in small.names if name != "spec")
