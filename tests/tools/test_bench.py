"""barsmith bench: one run reports start-up, replay against decode-only at two sizes, and memory."""

from __future__ import annotations

from barsmith.tools.bench import run_bench


def test_one_round_reports_every_figure() -> None:
    lines = run_bench(ticks=400, symbols=3, seed=5, rounds=1)
    text = "\n".join(lines)
    assert "start-up, barsmith --help" in text and "start-up, replay of a one-record file" in text
    for n in (100, 400):
        assert f"{n:>11,} ticks: decode-only (msgpack.Unpacker)" in text
        assert f"{n:>11,} ticks: replay / decode-only throughput" in text
    assert text.count("peak RSS replaying") == 2
