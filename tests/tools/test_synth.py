"""The synthetic feed: reproducible, invented names, the promised texture."""

from __future__ import annotations

import itertools
from collections import Counter
from pathlib import Path

from barsmith.tools.synth import VENUE, SynthConfig, feed_bytes, generate, write_feed


def test_same_seed_same_bytes(tmp_path: Path) -> None:
    cfg = SynthConfig(messages=5_000, symbols=4, duration_s=300)
    a, b = tmp_path / "a.msgpack.gz", tmp_path / "b.msgpack.gz"
    write_feed(a, cfg)
    write_feed(b, cfg)
    assert a.read_bytes() == b.read_bytes()
    assert b"".join(feed_bytes(SynthConfig(messages=5_000, symbols=4, duration_s=300, seed=8))) != b"".join(
        feed_bytes(cfg)
    )


def test_texture_of_the_feed() -> None:
    cfg = SynthConfig(messages=40_000, symbols=10, duration_s=3600)
    msgs = list(generate(cfg))
    assert len(msgs) == 40_000
    by_symbol = Counter(m["sym"] for m in msgs)
    assert len(by_symbol) == 10 and all(sym.endswith("~" + VENUE) for sym in by_symbol)
    assert max(by_symbol.values()) > 50 * min(by_symbol.values())  # very different liquidity
    kinds = Counter(m["kind"] for m in msgs)
    assert kinds["snapshot"] > 10
    assert sum("trade_px" in m for m in msgs) > 1000
    # Duplicates (same symbol and seq twice) and gaps (a seq skipped) both occur.
    seen: set[tuple[str, int]] = set()
    duplicates = gaps = 0
    last: dict[str, int] = {}
    for m in msgs:
        key = (m["sym"], m["seq"])
        duplicates += key in seen
        seen.add(key)
        gaps += m["seq"] > last.get(m["sym"], 0) + 1
        last[m["sym"]] = max(last.get(m["sym"], 0), m["seq"])
    assert duplicates > 0 and gaps > 0
    # Spreads of one to a few ticks.
    spreads = [m["ask_px"] - m["bid_px"] for m in msgs if m["kind"] == "snapshot"]
    assert min(spreads) > 0 and max(spreads) < 2.0


def test_the_order_flow_process_shows_every_column() -> None:
    from factories import run_engine

    from barsmith.bars.spec import parse_specs

    msgs = list(generate(SynthConfig(messages=20_000, symbols=3, duration_s=1200, order_flow=True)))
    bars, _engine = run_engine(msgs, specs=("time:1m@all", "volume-imbalance:40@signed"))
    (spec,) = parse_specs(["time:1m@all"])
    timed = [b for b in bars if b.spec == "time:1m@all"]
    # unsigned_volume stays 0 (every trade has a valid quote or an earlier different price),
    # and the invented venue's book never crosses or locks.
    for column in spec.columns:
        zero_ok = column.name in ("unsigned_volume", "crossed_messages", "locked_messages")
        empty = (None,) if zero_ok else (None, 0, 0.0)
        assert any(b.get(column.name) not in empty for b in timed), column.name
    assert any(b.spec.startswith("volume-imbalance") for b in bars)
    # Persistent order flow: consecutive Lee-Ready signs of a symbol agree far more often than
    # the coin toss's one half (the process repeats a side with probability 0.8).
    singles, _ = run_engine(msgs, specs=("trades:1@signed",))
    signs: dict[str, list[int]] = {}
    for b in singles:
        signs.setdefault(b.symbol, []).append(b.buy_trades - b.sell_trades)
    pairs = [(a, c) for seq in signs.values() for a, c in itertools.pairwise(seq) if a and c]
    assert len(pairs) > 1000 and sum(a == c for a, c in pairs) / len(pairs) > 0.7
    # The demo's coin tosses are untouched by the new knobs (they take no random numbers).
    assert list(generate(SynthConfig(messages=2_000))) == list(
        generate(SynthConfig(messages=2_000, sign_persistence=0.1, midpoint_share=0.9))
    )


def test_a_depth_feed_has_the_top_of_book_feeds_trades_and_clean_levels() -> None:
    from factories import run_engine

    cfg = SynthConfig(messages=8_000, symbols=3, duration_s=900, order_flow=True)
    deep = list(generate(SynthConfig(messages=8_000, symbols=3, duration_s=900, order_flow=True, depth=10)))
    assert all("bid_px" not in m and "ask_qty" not in m for m in deep)
    assert sum("bids" in m or "asks" in m for m in deep) > len(deep) // 2
    snapshots = [m for m in deep if m["kind"] == "snapshot"]
    assert snapshots and all(len(m["bids"]) <= 10 and len(m["asks"]) <= 10 for m in snapshots)
    bars, engine = run_engine(deep, specs=("time:1m@all",))
    assert not engine.stats.rejected and engine.stats.accepted + engine.stats.duplicates == len(deep)
    flat, _ = run_engine(list(generate(cfg)), specs=("time:1m@core",))
    assert [b.values[4:11] for b in bars] == [b.values[4:11] for b in flat]  # the same trades
    assert all(b.bid_qty_mean is not None for b in bars if b.spread_mean is not None)
