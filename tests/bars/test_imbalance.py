"""Imbalance bars on short feeds whose thresholds are followed by hand.

Source: López de Prado, M. (2018), Advances in Financial Machine Learning, ch. 2
(from memory, see REFERENCES.md): tick-rule signs b_t, θ_T = Σ b_t (or Σ b_t·v_t,
Σ b_t·p_t·v_t); a bar closes when |θ_T| reaches E0[T]·|E0[x]|, the expectations
exponentially weighted over earlier bars. The bounds and the first bar's rule are
barsmith's own (module docstring of barsmith.bars.imbalance).
"""

from __future__ import annotations

import re
from typing import Any

import pytest
from factories import T0, S, run_engine, trade
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.errors import BarSpecError

SYM = "BRAMBLECOTE.ZNV"


def trades(*fills: tuple[float, float]) -> list[dict[str, Any]]:
    return [trade(SYM, T0 + i * S, i + 1, px, qty) for i, (px, qty) in enumerate(fills)]


def shape(bars: list[Any]) -> list[tuple[int, float, float | None, bool]]:
    return [(b.trades, b.imbalance, b.imbalance_threshold, b.complete) for b in bars]


def test_tick_imbalance_by_hand() -> None:
    # E0[T] = 4, span 3 (a = 2/(3+1) = 0.5), bound 2: bars of 2 to 8 trades.
    prices = [10, 11, 12, 12, 11, 12, 13, 14, 15, 14, 13, 12, 11, 11, 12, 13]
    bars, _ = run_engine(trades(*[(p, 1.0) for p in prices]), specs=("tick-imbalance:4,span=3,bound=2",))
    # Bar 1: signs 0 (no earlier price) +1 +1 +1 (zero tick keeps +1): θ = 3 after 4 = E0[T] trades.
    #   E[T] = 0.5·4 + 0.5·4 = 4; E[x] = 3/4 (the first bar's mean); threshold 4·0.75 = 3.
    # Bar 2: -1 +1 +1 +1 +1: θ reaches 3 at the 5th trade.
    #   E[T] = 0.5·5 + 0.5·4 = 4.5; E[x] = 0.5·3/5 + 0.5·0.75 = 0.675; threshold 4.5·0.675 = 3.0375.
    # Bar 3: -1 -1 -1 -1: |θ| = 3 < 3.0375, closes at θ = -4.
    #   E[T] = 0.5·4 + 0.5·4.5 = 4.25; E[x] = 0.5·(-1) + 0.5·0.675 = -0.1625; threshold 0.690625.
    # Bar 4: -1 (zero tick) then +1: T = 2 but |θ| = 0; +1: θ = 1 closes it.
    expected = [(4, 3.0, None, True), (5, 3.0, 3.0, True), (4, -4.0, 3.0375, True), (3, 1.0, 0.690625, True)]
    assert len(bars) == len(expected)
    for got, want in zip(shape(bars), expected, strict=True):
        assert got[0] == want[0] and got[1] == want[1] and got[3] == want[3]
        assert got[2] == (None if want[2] is None else pytest.approx(want[2]))


def test_volume_and_notional_imbalance_by_hand() -> None:
    # span 1: a = 1, each expectation is the last bar's. Bound 10: at least 1 trade.
    fills = [(10.0, 1.0), (11.0, 2.0), (10.0, 1.0), (9.0, 3.0), (9.0, 5.0)]
    bars, _ = run_engine(trades(*fills), specs=("volume-imbalance:2,span=1",))
    # Bar 1: x = 0·1, +1·2 -> θ = 2 after E0[T] = 2 trades; E[T] = 2, E[x] = 1; threshold 2.
    # Bar 2: -1, -3 -> θ = -4 at T = 2; E[T] = 2, E[x] = -2; threshold 4.
    # Bar 3: zero tick keeps -1: -5, |θ| = 5 >= 4 at once.
    assert shape(bars) == [(2, 2.0, None, True), (2, -4.0, 2.0, True), (1, -5.0, 4.0, True)]
    bars, _ = run_engine(trades(*fills), specs=("notional-imbalance:2,span=1",))
    # Bar 1: θ = +11·2 = 22; E[x] = 11, threshold 2·11 = 22. Bar 2: -10 (|θ| < 22), then -27:
    # θ = -37 closes it; E[x] = -18.5, threshold 37. Bar 3: -9·5 = -45 at once.
    assert shape(bars) == [(2, 22.0, None, True), (2, -37.0, 22.0, True), (1, -45.0, 37.0, True)]


def test_the_bounds_stop_runaway_thresholds() -> None:
    # A balanced first bar gives E[x] = 0, so a threshold of 0: without a floor every later
    # trade would close a bar. E0[T] = 5, bound 2.5: bars of ceil(2) to ceil(12.5) = 13 trades.
    prices = [10, 11, 10, 11, 10] + [11, 10] * 3  # signs 0 +1 -1 +1 -1, then +1 -1 ...
    bars, _ = run_engine(trades(*[(p, 1.0) for p in prices]), specs=("tick-imbalance:5,bound=2.5",))
    assert [(b.trades, b.imbalance_threshold) for b in bars] == [(5, None), (2, 0.0), (2, 0.0), (2, 0.0)]
    # A strongly one-sided first bar, then a balanced flow that never reaches the threshold:
    # it closes at the ceiling. E0[T] = 6, bound 3: at most 18 trades.
    prices = [10, 11, 12, 13, 14, 15] + [14, 15] * 9
    bars, _ = run_engine(trades(*[(p, 1.0) for p in prices]), specs=("tick-imbalance:6,bound=3",))
    # Bar 1: θ = 5 (first sign 0), E[x] = 5/6, threshold 6·5/6 = 5; bar 2 swings between -1 and 0.
    assert [(b.trades, b.imbalance) for b in bars] == [(6, 5.0), (18, 0.0)]
    assert bars[1].imbalance_threshold == pytest.approx(5.0)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("tick-imbalance:0.5", "the expected length is a number >= 1"),
        ("tick-imbalance:abc", "needs <expected trades per bar>"),
        ("volume-imbalance:10,span=0", "'span=0'"),
        ("volume-imbalance:10,bound=1", "'bound=1'"),
        ("notional-imbalance:10,speed=2", "'speed=2'"),
    ],
)
def test_bad_parameters_are_refused(text: str, message: str) -> None:
    with pytest.raises(BarSpecError, match=re.escape(message)):
        parse_specs([text])


SPECS = ("tick-imbalance:3,span=2", "volume-imbalance:4@all", "notional-imbalance:5,bound=4")


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(95, 105), st.integers(1, 9)), min_size=1, max_size=60), st.data())
def test_the_state_survives_checkpoints(fills: list[tuple[int, int]], data: st.DataObject) -> None:
    recs = trades(*[(float(p), float(q)) for p, q in fills])
    whole, _ = run_engine(recs, specs=SPECS)
    cut = data.draw(st.integers(0, len(recs)))
    specs = parse_specs(list(SPECS))
    first = Engine(specs, 0)
    first.process(recs[:cut], list(range(cut)), "t")
    got = first.take_bars()
    second, _ = decode_checkpoint(encode_checkpoint(first), specs, 0)
    second.process(recs[cut:], list(range(cut, len(recs))), "t")
    second.finish()
    got += second.take_bars()
    assert got == whole
