"""The Parquet sink: rolling files, atomic renames, readable output."""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd
from factories import T0, run_engine, trade

from barsmith.bars.spec import parse_specs
from barsmith.sinks.parquet import ParquetBarSink


async def test_files_roll_by_size_and_time_and_are_renamed_when_complete(tmp_path: Path) -> None:
    bars, _ = run_engine([trade("FENWORTH~KESMOOR", T0 + i * 60_000_000_000, i + 1, 10.0, 1.0) for i in range(50)])
    sink = ParquetBarSink(tmp_path, parse_specs(["time:1m"]), row_group_rows=10, max_file_rows=20, roll_interval_s=0.2)
    await sink.publish("s", bars[:15])  # one row group written; the file stays open
    assert not list(tmp_path.glob("time_1m-*.parquet"))
    assert len(list(tmp_path.glob(".*.tmp"))) == 1  # hidden from readers while open
    await sink.publish("s", bars[15:25])  # 25 rows >= 20: the file is complete and renamed
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 1 and not list(tmp_path.glob(".*.tmp"))
    await sink.publish("s", bars[25:37])  # a second file opens
    time.sleep(0.25)
    await sink.publish("s", bars[37:40])  # nothing to write yet, but the open file is too old: it rolls
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 2
    await sink.publish("s", bars[40:])
    await sink.close()
    assert len(list(tmp_path.glob("time_1m-*.parquet"))) == 3 and not list(tmp_path.glob(".*.tmp"))
    frame = pd.read_parquet(tmp_path)
    assert len(frame) == len(bars) and frame["start"].is_monotonic_increasing


async def test_parts_commit_with_checkpoints_and_recover_after_a_crash(tmp_path: Path) -> None:
    """The exactly-once sink: bars travel in the checkpoint until a part is due; a due part is a
    hidden temporary file until its checkpoint commits; a restore finishes committed parts and
    deletes the others."""
    from barsmith.ingest.rejects import Reject
    from barsmith.ingest.ticks import RejectReason
    from barsmith.sinks.parquet import ParquetPartSink

    bars, _ = run_engine([trade("FENWORTH~KESMOOR", T0 + i * 60_000_000_000, i + 1, 10.0, 1.0) for i in range(30)])
    specs = parse_specs(["time:1m"])
    sink = ParquetPartSink(tmp_path, specs, roll_interval_s=3600, carry_max_rows=20)
    await sink.restore("ticks[3]", None, 0)
    await sink.publish("ticks[3]", bars[:10])
    await sink.write([Reject("ticks[3]", 4, RejectReason.NOT_MSGPACK, "cut short", b"\xc1")])
    carried = await sink.prepare("ticks[3]", 100, final=False)  # not due: carried in the checkpoint
    assert carried["parts"] == [] and len(carried["bars"]) == 10 and len(carried["rejects"]) == 1
    await sink.committed("ticks[3]", carried)
    assert not list(tmp_path.iterdir())

    # A new owner restores that checkpoint and continues; 20 bars make a part due.
    sink = ParquetPartSink(tmp_path, specs, roll_interval_s=3600, carry_max_rows=20)
    await sink.restore("ticks[3]", carried, 100)
    await sink.publish("ticks[3]", bars[10:20])
    staged = await sink.prepare("ticks[3]", 200, final=False)
    names = [
        "time_1m-ticks.p3-000000000000-000000000200.parquet",
        "_rejects-ticks.p3-000000000000-000000000200.parquet",
    ]
    assert staged["parts"] == names and staged["from"] == 200
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(f".{n}.tmp" for n in names)
    assert pd.read_parquet(tmp_path).empty  # readers skip hidden files: nothing visible yet

    # Crash after the commit, before the rename: the restore finishes the committed parts.
    await ParquetPartSink(tmp_path, specs, roll_interval_s=3600).restore("ticks[3]", staged, 200)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(names)
    assert len(pd.read_parquet(tmp_path)) == 20
    assert len(pd.read_parquet(tmp_path / names[1])) == 1  # the reject, beside the bars

    # A part staged for a checkpoint that never committed is deleted by the restore.
    sink = ParquetPartSink(tmp_path, specs, roll_interval_s=3600, carry_max_rows=5)
    await sink.restore("ticks[3]", staged, 200)
    await sink.publish("ticks[3]", bars[20:])
    lost = await sink.prepare("ticks[3]", 300, final=True)
    assert len(lost["parts"]) == 1 and (tmp_path / f".{lost['parts'][0]}.tmp").exists()
    await ParquetPartSink(tmp_path, specs, roll_interval_s=3600).restore("ticks[3]", staged, 200)
    assert not list(tmp_path.glob(".*.tmp")) and len(pd.read_parquet(tmp_path)) == 20
