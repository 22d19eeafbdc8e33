"""Soak: a valid synthetic feed with 100,000 hostile insertions, through ``replay``.

Zero crashes, zero valid ticks lost, and the bars of the valid feed's symbols equal
those of a clean run, compared on the Parquet files read back with pandas.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from hostile import hostile_feed

from barsmith.replay import replay_files

SPECS = ["time:1m", "trades:50", "volume:5000", "notional:1e6"]
KEY = ["spec", "symbol", "start", "end"]


def bars(out: Path) -> pd.DataFrame:
    return pd.read_parquet(out).sort_values(KEY).reset_index(drop=True)


@pytest.mark.slow
def test_hostile_insertions_cost_no_valid_tick(tmp_path: Path) -> None:
    feed = hostile_feed(seed=5, messages=100_000, insertions=100_000)
    assert len(feed.spans) > 60_000  # insertions in one gap join into one span
    clean = tmp_path / "clean.msgpack"
    clean.write_bytes(b"".join(feed.records))
    damaged = tmp_path / "damaged.msgpack"
    damaged.write_bytes(feed.data)

    reference = replay_files([clean], tmp_path / "clean-out", bars=SPECS)
    summary = replay_files([damaged], tmp_path / "damaged-out", bars=SPECS)

    assert reference.stats.rejected == {}
    for counter in ("accepted", "duplicates", "gaps", "late", "time_regressions"):
        assert getattr(summary.stats, counter) == getattr(reference.stats, counter), counter
    assert summary.stats.rejected["not_msgpack"] > 30_000
    assert summary.stats.rejected.keys() <= {
        *("not_msgpack", "truncated", "not_a_map", "missing_field", "wrong_type", "bad_value"),
        *("unknown_kind", "half_trade"),
    }

    got, want = bars(tmp_path / "damaged-out"), bars(tmp_path / "clean-out")
    assert set(got["symbol"]) == set(want["symbol"])
    pd.testing.assert_frame_equal(got, want)

    rejects = pd.read_parquet(tmp_path / "damaged-out" / "_rejects.parquet")
    assert len(rejects) == sum(summary.stats.rejected.values())
    # Every reject is at a damaged byte, never at a valid record.
    valid_starts = set(feed.offsets)
    assert not valid_starts & set(rejects.loc[rejects["reason"] != "late", "position"])
