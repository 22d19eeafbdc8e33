"""The microstructure groups and an imbalance family in the live service, on a real broker:
the bus and Parquet carry the new columns, and a stop mid-stream restores every group's and
family's state from the checkpoints, giving exactly what replay gives."""

from __future__ import annotations

import asyncio
import signal
import time
from pathlib import Path
from typing import Any

import msgpack
import pandas as pd
from test_service import KEY, assert_same_bars, kafka, read_records, service_settings

from barsmith.bars.spec import parse_specs
from barsmith.replay import replay_files
from barsmith.service.app import build_service
from barsmith.tools.feeds import publish_feed
from barsmith.tools.synth import SynthConfig, write_feed

SPECS = ["time:1m@all", "volume-imbalance:60@signed,flow"]


def spec_frame(directory: Path, spec: str) -> pd.DataFrame:
    (parsed,) = parse_specs([spec])
    files = sorted(directory.glob(f"{parsed.file_stem}-*.parquet"))
    assert files, f"no Parquet files for {spec}"
    frame = pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)
    assert list(frame.columns) == [c.name for c in parsed.columns]
    return frame.sort_values(KEY).reset_index(drop=True)


def bus_frame(records: list[Any], spec: str) -> pd.DataFrame:
    (parsed,) = parse_specs([spec])
    names = [c.name for c in parsed.columns]
    rows = [bar for bar in (msgpack.unpackb(r.value) for r in records) if bar["spec"] == spec]
    assert rows and all(list(bar) == names for bar in rows)
    frame = pd.DataFrame(rows, columns=names)
    for column in ("start", "end"):
        frame[column] = pd.to_datetime(frame[column], unit="ns", utc=True)
    return frame.sort_values(KEY).reset_index(drop=True)


async def run_with_a_restart(bootstrap: str, feed: Path, name: str, specs: list[str], out: Path) -> list[Any]:
    """Publish ``feed``, run the service, stop it halfway, run it again in drain mode;
    returns the bar topic's records."""
    sent = await publish_feed([feed], kafka(bootstrap), f"{name}-ticks", partitions=8)
    common: dict[str, Any] = {"kafka": {"output_topic": f"{name}-bars"}, "parquet": {"dir": out}}
    runner = build_service(
        service_settings(bootstrap, f"{name}-ticks", bars=specs, service={"exit_when_idle_s": None}, **common)
    )
    task = asyncio.create_task(runner.serve())
    deadline = time.monotonic() + 180
    while runner.total_stats().records < sent.ticks // 2:
        assert time.monotonic() < deadline and not task.done(), "the service did not get halfway in time"
        await asyncio.sleep(0.05)
    runner.handle_exit(signal.SIGTERM)  # open bars stay open, in the checkpoints
    await asyncio.wait_for(task, timeout=60)
    # The same group again in drain mode: it continues from the checkpoints.
    await build_service(service_settings(bootstrap, f"{name}-ticks", bars=specs, **common)).serve()
    return await read_records(bootstrap, f"{name}-bars")


async def test_new_columns_on_the_bus_and_in_parquet_survive_a_restart(kafka_bootstrap: str, tmp_path: Path) -> None:
    feed = tmp_path / "flow.msgpack.gz"
    write_feed(feed, SynthConfig(messages=30_000, symbols=6, duration_s=1200, seed=5, order_flow=True))
    records = await run_with_a_restart(kafka_bootstrap, feed, "flow", SPECS, tmp_path / "service")
    await asyncio.to_thread(replay_files, [feed], tmp_path / "replay", bars=SPECS, partitions=8, replace=True)
    for spec in SPECS:
        expected = spec_frame(tmp_path / "replay", spec)
        assert_same_bars(expected, spec_frame(tmp_path / "service", spec))
        assert_same_bars(expected, bus_frame(records, spec))
    minutes = spec_frame(tmp_path / "replay", "time:1m@all")
    assert minutes["ofi"].notna().any() and minutes["realized_var"].notna().any()
    assert (
        minutes["buy_volume"] + minutes["sell_volume"] + minutes["unsigned_volume"] - minutes["volume"]
    ).abs().max() < 1e-6


async def test_a_depth_feed_in_the_service_is_replay(kafka_bootstrap: str, tmp_path: Path) -> None:
    """Depth books (10 levels a side) through the service, stopped halfway and restored from
    their checkpoints: the same bars as replay, on the bus and in Parquet."""
    feed = tmp_path / "depth.msgpack.gz"
    write_feed(feed, SynthConfig(messages=20_000, symbols=5, duration_s=900, seed=9, order_flow=True, depth=10))
    specs = ["time:1m@all"]
    records = await run_with_a_restart(kafka_bootstrap, feed, "depth", specs, tmp_path / "service")
    summary = await asyncio.to_thread(replay_files, [feed], tmp_path / "replay", bars=specs, partitions=8, replace=True)
    assert not summary.stats.rejected
    expected = spec_frame(tmp_path / "replay", specs[0])
    assert_same_bars(expected, spec_frame(tmp_path / "service", specs[0]))
    assert_same_bars(expected, bus_frame(records, specs[0]))
    assert expected["bid_qty_mean"].notna().any() and expected["depth_imbalance_mean"].notna().any()
