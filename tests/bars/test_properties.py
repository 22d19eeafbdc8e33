"""Properties that hold for any input (hypothesis)."""

from __future__ import annotations

import itertools
from typing import Any

from factories import FEED_SPECS as SPECS
from factories import FEED_SYMBOLS as SYMS
from factories import S, feeds, run_engine
from hypothesis import given, settings
from hypothesis import strategies as st

from barsmith.bars.spec import BarKind, parse_specs


def accepted_trades(recs: list[dict[str, Any]]) -> list[tuple[str, int, float]]:
    """Trades the engine must use: sequence rules applied by hand (README, "Book rules")."""
    last: dict[str, int] = {}
    out = []
    for rec in recs:
        sym, seq = rec["sym"], rec["seq"]
        if rec["kind"] == "snapshot":
            last[sym] = seq
            continue
        if sym in last and seq <= last[sym]:
            continue
        last[sym] = seq
        if "trade_px" in rec:
            out.append((sym, seq, rec["trade_qty"]))
    return out


@settings(max_examples=150, deadline=None)
@given(feeds(), st.sampled_from([0, 2 * S]))
def test_bar_invariants(recs: list[dict[str, Any]], lateness: int) -> None:
    bars, engine = run_engine(recs, specs=SPECS, lateness_ns=lateness)
    trades = accepted_trades(recs)
    rejects = engine.take_rejects()
    for spec in parse_specs(list(SPECS)):
        mine = [b for b in bars if b.spec == spec.text]
        late_trades = 0
        if spec.kind is BarKind.TIME:
            late_trades = sum(1 for r in rejects if spec.text in r.detail and _is_trade(_decode(r.record)))
        # Every accepted trade is in exactly one bar (time bars: except those recorded as late).
        assert sum(b.trades for b in mine) == len(trades) - late_trades
        if late_trades == 0:
            assert sum(b.volume for b in mine) == sum(q for _, _, q in trades)
        for bar in mine:
            if bar.trades:
                assert bar.low is not None and bar.high is not None
                assert bar.low <= bar.open <= bar.high  # type: ignore[operator]
                assert bar.low <= bar.close <= bar.high  # type: ignore[operator]
            if bar.spread_mean is not None:
                assert bar.spread_min <= bar.spread_mean + 1e-12  # type: ignore[operator]
                assert bar.spread_mean <= bar.spread_max + 1e-12  # type: ignore[operator]
        for sym in SYMS:
            own = sorted((b.start, b.end) for b in mine if b.symbol == sym)
            for (s1, e1), (s2, _) in itertools.pairwise(own):
                # A symbol's bars never overlap (event bars may share a boundary tick time).
                assert e1 <= s2 if spec.kind is BarKind.TIME else e1 <= s2 or s1 == e1 == s2
            if spec.kind is BarKind.TIME:
                assert all((e - s) == spec.interval_ns and s % spec.interval_ns == 0 for s, e in own)


def _is_trade(rec: dict[str, Any]) -> bool:
    return rec["kind"] == "delta" and "trade_px" in rec  # a snapshot's trade fields are state


def _decode(raw: bytes) -> dict[str, Any]:
    import msgpack

    value: dict[str, Any] = msgpack.unpackb(raw)
    return value


@settings(max_examples=50, deadline=None)
@given(feeds())
def test_same_input_gives_identical_bars(recs: list[dict[str, Any]]) -> None:
    first, _ = run_engine(recs, specs=SPECS, lateness_ns=S)
    second, _ = run_engine(recs, specs=SPECS, lateness_ns=S)
    assert first == second
