"""The synthetic feed: reproducible, invented names, the promised texture."""

from __future__ import annotations

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
    assert len(by_symbol) == 10 and all(sym.endswith("." + VENUE) for sym in by_symbol)
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
