"""The Parquet sink: rolling files, atomic renames, readable output."""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd
from factories import T0, run_engine, trade

from barsmith.bars.spec import parse_specs
from barsmith.sinks.parquet import ParquetBarSink


async def test_files_roll_by_size_and_time_and_are_renamed_when_complete(tmp_path: Path) -> None:
    bars, _ = run_engine([trade("FENWORTH.KMX", T0 + i * 60_000_000_000, i + 1, 10.0, 1.0) for i in range(50)])
    sink = ParquetBarSink(tmp_path, parse_specs(["time:1m"]), row_group_rows=10, max_file_rows=20, roll_interval_s=0.2)
    await sink.publish(bars[:15])  # one row group written; the file stays open
    assert not list(tmp_path.glob("time_1m-*.parquet"))
    assert len(list(tmp_path.glob(".*.tmp"))) == 1  # hidden from readers while open
    await sink.publish(bars[15:25])  # 25 rows >= 20: the file is complete and renamed
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 1 and not list(tmp_path.glob(".*.tmp"))
    await sink.publish(bars[25:37])  # a second file opens
    time.sleep(0.25)
    await sink.publish(bars[37:40])  # nothing to write yet, but the open file is too old: it rolls
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 2
    await sink.publish(bars[40:])
    await sink.close()
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 3 and not list(tmp_path.glob(".*.tmp"))
    frame = pd.read_parquet(tmp_path)
    assert len(frame) == len(bars) and frame["start"].is_monotonic_increasing
