"""The live service on a real broker: the same bars as replay, scaling, signals, metrics."""

from __future__ import annotations

import asyncio
import re
import signal
import subprocess
import sys
import time
import urllib.request
from collections import Counter
from pathlib import Path
from typing import Any

import msgpack
import pandas as pd
import pytest
from factories import free_port_pair
from prometheus_client.parser import text_string_to_metric_families

from barsmith.bars.bar import BAR_COLUMNS
from barsmith.bus import partition_for
from barsmith.ingest.framed import FILE_MAGIC
from barsmith.replay import replay_files
from barsmith.service.app import build_service
from barsmith.settings import KafkaSettings, load_settings
from barsmith.tools.feeds import publish_feed, record_topic
from barsmith.tools.synth import SynthConfig, generate, write_feed

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "demo_feeds" / "kestrelmoor-evening.msgpack.gz"
SPECS = ["time:1m", "volume:5000", "notional:1e6"]
KEY = ["spec", "symbol", "start", "end"]


def kafka(bootstrap: str) -> KafkaSettings:
    return load_settings(kafka={"bootstrap_servers": [bootstrap]}).kafka


@pytest.fixture(scope="module")
def small_feed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("feeds") / "small.msgpack.gz"
    write_feed(path, SynthConfig(messages=40_000, symbols=10, duration_s=1200, malformed=3, seed=21))
    return path


def replay_frame(feed: Path, out: Path, partitions: int = 8) -> pd.DataFrame:
    replay_files([feed], out, bars=SPECS, partitions=partitions, replace=True)
    return pd.read_parquet(out).sort_values(KEY).reset_index(drop=True)


def parquet_frame(directory: Path) -> pd.DataFrame:
    assert not list(directory.glob(".*.tmp")), "temporary files left behind"
    return pd.read_parquet(directory).sort_values(KEY).reset_index(drop=True)


async def read_records(bootstrap: str, topic: str) -> list[Any]:
    """Every committed record of ``topic`` (read_committed), until three polls bring nothing."""
    from aiokafka import AIOKafkaConsumer

    consumer = AIOKafkaConsumer(
        topic,
        bootstrap_servers=bootstrap,
        auto_offset_reset="earliest",
        isolation_level="read_committed",
        enable_auto_commit=False,
    )
    await consumer.start()
    out: list[Any] = []
    try:
        idle_polls = 0
        while idle_polls < 3:
            polled = await consumer.getmany(timeout_ms=1000)
            idle_polls = 0 if polled else idle_polls + 1
            for records in polled.values():
                out.extend(records)
    finally:
        await consumer.stop()
    return out


OUTPUT_PARTITIONS = 8  # the service creates a missing output topic with kafka.output_partitions (8)


async def read_topic(bootstrap: str, topic: str, columns: tuple[str, ...] = BAR_COLUMNS) -> pd.DataFrame:
    """The bar topic, read_committed, as a frame with the Parquet columns and types."""
    from aiokafka.partitioner import DefaultPartitioner

    rows: list[dict[str, Any]] = []
    partitions = list(range(OUTPUT_PARTITIONS))
    for record in await read_records(bootstrap, topic):
        bar = msgpack.unpackb(record.value)
        assert list(bar) == list(columns)  # exactly the Parquet columns
        assert record.key.decode("utf-8") == bar["symbol"]
        # Keyed records go where Kafka's default partitioner (murmur2 of the key, as
        # aiokafka implements it) puts them: consumers keyed by symbol rely on it.
        assert record.partition == DefaultPartitioner()(record.key, partitions, partitions)
        assert dict(record.headers)["spec"].decode("utf-8") == bar["spec"]
        rows.append(bar)
    frame = pd.DataFrame(rows, columns=list(columns))
    for column in ("start", "end"):
        frame[column] = pd.to_datetime(frame[column], unit="ns", utc=True)
    return frame.sort_values(KEY).reset_index(drop=True)


def assert_same_bars(expected: pd.DataFrame, actual: pd.DataFrame) -> None:
    assert len(actual) == len(expected)
    pd.testing.assert_frame_equal(expected, actual[list(expected.columns)], check_dtype=False)


def service_settings(bootstrap: str, topic: str, **extra: Any) -> Any:
    overrides: dict[str, Any] = {
        "bars": SPECS,
        "kafka": {"bootstrap_servers": [bootstrap], "input_topics": [topic], "group_id": f"g-{topic}"},
        "metrics": {"port": 0},
        "service": {"exit_when_idle_s": 4.0},
    }
    for key, value in extra.items():
        if isinstance(value, dict):
            overrides.setdefault(key, {}).update(value)
        else:
            overrides[key] = value
    return load_settings(**overrides)


def scrape(port: int, path: str = "/metrics") -> tuple[int, str]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as response:
            return response.status, response.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


async def test_service_builds_the_bars_replay_builds(kafka_bootstrap: str, tmp_path: Path) -> None:
    """Demo feed → 8-partition topic → service (bus + Parquet) = replay --partitions 8, field for field;
    the metrics endpoint, scraped over HTTP, agrees with the run's summary. Exactly-once: SIGTERM
    keeps open bars open in the checkpoints, and a second run in drain mode finishes them."""
    topic = "demo-ticks"
    sent = await publish_feed([DEMO], kafka(kafka_bootstrap), topic, partitions=8)
    assert sent.records > 200_000
    settings = service_settings(
        kafka_bootstrap,
        topic,
        kafka={"output_topic": "demo-bars"},
        parquet={"dir": tmp_path / "service"},
        service={"exit_when_idle_s": None},
    )
    runner = build_service(settings)
    task = asyncio.create_task(runner.serve())
    deadline = time.monotonic() + 180
    while runner.total_stats().records < sent.ticks:
        assert time.monotonic() < deadline, "the service did not consume the feed in time"
        assert not task.done(), task
        await asyncio.sleep(0.5)
    port = runner.metrics_port
    assert port is not None
    assert (await asyncio.to_thread(scrape, port, "/healthz"))[0] == 200
    assert (await asyncio.to_thread(scrape, port, "/readyz"))[0] == 200
    status, text = await asyncio.to_thread(scrape, port)
    assert status == 200
    metrics = samples(text)
    runner.handle_exit(signal.SIGTERM)
    summary = await asyncio.wait_for(task, timeout=60)

    stats = summary.stats
    assert metrics[("barsmith_messages_total", (("outcome", "accepted"),))] == stats.accepted
    assert metrics[("barsmith_messages_total", (("outcome", "duplicate"),))] == stats.duplicates
    assert metrics[("barsmith_messages_total", (("outcome", "gap"),))] == stats.gaps
    assert metrics[("barsmith_messages_total", (("outcome", "rejected"),))] == sum(stats.rejected.values())
    assert metrics[("barsmith_messages_total", (("outcome", "late"),))] == stats.late
    for reason, count in stats.rejected.items():
        assert metrics[("barsmith_rejects_total", (("reason", reason),))] == count
    lags = [v for (name, _), v in metrics.items() if name == "barsmith_consumer_lag_records"]
    assert len(lags) == 8 and all(v == 0 for v in lags)
    assert sum(v for (n, _), v in metrics.items() if n == "barsmith_watermark_seconds") > 0
    # Bars counted at scrape time are those closed so far (the rest close at shutdown).
    for spec in SPECS:
        assert metrics[("barsmith_bars_closed_total", (("spec", spec),))] <= stats.bars[spec]

    expected = await asyncio.to_thread(replay_frame, DEMO, tmp_path / "replay")
    closed = expected[expected["complete"]].reset_index(drop=True)
    assert len(closed) < len(expected)
    assert_same_bars(closed, parquet_frame(tmp_path / "service"))
    assert_same_bars(closed, await read_topic(kafka_bootstrap, "demo-bars"))

    # The same group again, in drain mode: it continues from the checkpoints, sees no
    # more input and closes the open bars as replay does at the end of its input.
    settings = service_settings(
        kafka_bootstrap,
        topic,
        kafka={"output_topic": "demo-bars"},
        parquet={"dir": tmp_path / "service"},
        service={"exit_when_idle_s": 2.0},
    )
    await build_service(settings).serve()
    assert_same_bars(expected, parquet_frame(tmp_path / "service"))
    assert_same_bars(expected, await read_topic(kafka_bootstrap, "demo-bars"))


async def test_batched_records_give_the_same_bars(kafka_bootstrap: str, small_feed: Path, tmp_path: Path) -> None:
    await publish_feed([small_feed], kafka(kafka_bootstrap), "batched-ticks", partitions=8, batch_ticks=64)
    settings = service_settings(kafka_bootstrap, "batched-ticks", parquet={"dir": tmp_path / "service"})
    summary = await build_service(settings).serve()
    assert summary.stats.records > 40_000
    expected = await asyncio.to_thread(replay_frame, small_feed, tmp_path / "replay")
    assert_same_bars(expected, parquet_frame(tmp_path / "service"))


def test_two_workers_split_the_partitions(kafka_bootstrap: str, small_feed: Path, tmp_path: Path) -> None:
    """--workers 2: two processes in one group share the partitions and together give the bars of one.
    Whichever drains first leaves the group and hands its partitions to the other through their
    checkpoints (exactly-once), so no open bar is lost on the way out."""
    out = tmp_path / "service"
    base_port = free_port_pair()
    args = [
        sys.executable, "-m", "barsmith", "run", "--bootstrap", kafka_bootstrap, "--input-topic", "split-ticks",
        "--group", "g-split", "--parquet-dir", str(out), "--metrics-port", str(base_port),
        "--exit-when-idle", "8s", "--workers", "2", *[a for s in SPECS for a in ("--bars", s)],
    ]  # fmt: skip
    asyncio.run(_create_topic(kafka_bootstrap, "split-ticks"))
    proc = subprocess.Popen(args, stderr=subprocess.PIPE, text=True)
    try:
        _wait_ready([base_port, base_port + 1], proc)
        asyncio.run(publish_feed([small_feed], kafka(kafka_bootstrap), "split-ticks", partitions=8))
        _, stderr = proc.communicate(timeout=180)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, stderr[-3000:]
    # Both were ready before the feed was published: each held half of the partitions.
    halves = [set(m.group(1).split(", ")) for m in re.finditer(r"partitions assigned: (.*)", stderr)]
    assert any(len(a) == 4 and len(b) == 4 and not a & b for a in halves for b in halves), halves
    assert_same_bars(replay_frame(small_feed, tmp_path / "replay"), parquet_frame(out))


def _accepted(port: int) -> float:
    """Messages the service at ``port`` accepted so far (0 before its endpoint is up)."""
    try:
        _, text = scrape(port)
    except OSError:
        return 0.0
    return samples(text).get(("barsmith_messages_total", (("outcome", "accepted"),)), 0.0)


def test_sigterm_mid_stream_exits_cleanly(kafka_bootstrap: str, tmp_path: Path) -> None:
    topic = "sigterm-ticks"
    asyncio.run(publish_feed([DEMO], kafka(kafka_bootstrap), topic, partitions=8))
    out = tmp_path / "service"
    port = free_port_pair()
    args = [
        sys.executable, "-m", "barsmith", "run", "--bootstrap", kafka_bootstrap, "--input-topic", topic,
        "--group", "g-sigterm", "--output-topic", "sigterm-bars", "--parquet-dir", str(out),
        "--metrics-port", str(port), *[a for s in SPECS for a in ("--bars", s)],
    ]  # fmt: skip
    proc = subprocess.Popen(args, stderr=subprocess.PIPE, text=True)
    try:
        # Mid-stream: once the service has consumed part of the feed (the whole takes longer).
        deadline = time.monotonic() + 90
        while _accepted(port) < 20_000:
            assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
            assert time.monotonic() < deadline, "the service consumed nothing"
            time.sleep(0.2)
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        proc.send_signal(signal.SIGTERM)
        started = time.monotonic()
        _, stderr = proc.communicate(timeout=30)
        took = time.monotonic() - started
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, stderr[-3000:]
    assert took < load_settings().service.shutdown_timeout_s
    published = asyncio.run(read_topic(kafka_bootstrap, "sigterm-bars"))
    assert len(published) > 0
    on_disk = parquet_frame(out)
    assert len(on_disk) == len(published)
    assert set(on_disk.columns) == set(BAR_COLUMNS)


async def test_record_then_replay_round_trip(kafka_bootstrap: str, small_feed: Path, tmp_path: Path) -> None:
    settings = kafka(kafka_bootstrap)
    await publish_feed([small_feed], settings, "roundtrip-ticks", partitions=8)
    recorded = tmp_path / "recorded.bsf"
    count = await record_topic(settings, "roundtrip-ticks", recorded, idle_s=5)
    assert count > 40_000
    assert recorded.read_bytes().startswith(FILE_MAGIC)  # the framed format by default
    plain = tmp_path / "recorded-plain.msgpack.gz"
    assert await record_topic(settings, "roundtrip-ticks", plain, idle_s=5, plain=True) == count
    # Recording interleaves partitions but keeps each in order: per-partition bars are equal.
    original = await asyncio.to_thread(replay_frame, small_feed, tmp_path / "a")
    assert_same_bars(original, await asyncio.to_thread(replay_frame, recorded, tmp_path / "b"))
    assert_same_bars(original, await asyncio.to_thread(replay_frame, plain, tmp_path / "c"))


# -- helpers ---------------------------------------------------------------------------


async def _create_topic(bootstrap: str, topic: str, partitions: int = 8) -> None:
    from barsmith.bus import ensure_topic

    await ensure_topic(kafka(bootstrap), topic, partitions)


def _wait_ready(ports: list[int], proc: subprocess.Popen[str]) -> None:
    deadline = time.monotonic() + 90
    while True:
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        statuses = []
        for port in ports:
            try:
                statuses.append(scrape(port, "/readyz")[0])
            except OSError:
                statuses.append(0)
        if all(s == 200 for s in statuses):
            return
        assert time.monotonic() < deadline, f"workers not ready: {statuses}"
        time.sleep(0.5)


async def test_idle_rule_closes_bars_of_a_quiet_partition(kafka_bootstrap: str, tmp_path: Path) -> None:
    """Live-dated ticks, then silence: the idle rule closes their time bars (complete), where
    the watermark alone would have left the last ones open until shutdown (incomplete)."""
    now = time.time_ns()
    start = (now - 30_000_000_000) // 1_000_000_000 * 1_000_000_000  # whole seconds: 10 bars
    feed = tmp_path / "live.msgpack"
    ticks = [
        {"sym": "FENWORTH~KESMOOR", "ts": start + i * 100_000_000, "seq": i + 1, "kind": "delta",
         "trade_px": 10.0 + (i % 7) * 0.25, "trade_qty": 1.0}
        for i in range(100)
    ]  # fmt: skip
    feed.write_bytes(b"".join(msgpack.packb(t) for t in ticks))
    await publish_feed([feed], kafka(kafka_bootstrap), "idle-ticks", partitions=1)
    settings = service_settings(
        kafka_bootstrap,
        "idle-ticks",
        bars=["time:1s"],
        parquet={"dir": tmp_path / "service"},
        service={"idle_close_s": 1.0, "exit_when_idle_s": 5.0},
    )
    summary = await build_service(settings).serve()
    assert summary.stats.accepted == 100
    bars = pd.read_parquet(tmp_path / "service")
    assert len(bars) == 10 and bars["trades"].sum() == 100
    # Without the idle rule the last ~2 s of bars (within the lateness of the last tick)
    # could only have been flushed at shutdown, marked incomplete.
    assert bars["complete"].all()


def test_publish_shift_to_now_starts_the_feed_now_and_keeps_its_spacing(kafka_bootstrap: str, tmp_path: Path) -> None:
    """``barsmith publish --shift-to-now``: one offset added to every event time, so the
    first tick is stamped about when it is sent and every interval of the feed is kept."""
    from barsmith.cli import main

    config = SynthConfig(messages=3_000, symbols=4, duration_s=300, malformed=2, seed=9)
    feed = tmp_path / "dated.msgpack"
    write_feed(feed, config)
    original = {(t["sym"], t["seq"]): t["ts"] for t in generate(config)}
    before = time.time_ns()
    args = ["publish", str(feed), "--bootstrap", kafka_bootstrap, "--topic", "shifted-ticks", "--partitions", "2"]
    assert main([*args, "--shift-to-now"]) == 0
    published: dict[tuple[str, int], int] = {}
    for record in asyncio.run(read_records(kafka_bootstrap, "shifted-ticks")):
        value = msgpack.unpackb(record.value)
        for t in value if isinstance(value, list) else [value]:
            if isinstance(t, dict) and isinstance(t.get("ts"), int) and isinstance(t.get("seq"), int):
                published[(t["sym"], t["seq"])] = t["ts"]
    assert published.keys() == original.keys()
    shifts = {published[key] - original[key] for key in original}
    assert len(shifts) == 1  # one offset for all: the spacing is kept to the nanosecond
    first = min(original, key=lambda key: original[key])
    # The feed's first tick is stamped with the wall clock at about the moment it was sent.
    assert before - 1_000_000_000 <= published[first] <= time.time_ns()
    assert published[first] - before < 10 * 1_000_000_000


async def test_a_key_other_than_the_symbol_is_counted_and_the_value_decides(
    kafka_bootstrap: str, tmp_path: Path
) -> None:
    """README, "The live service": the key only placed the record; the value's sym decides
    its symbol, and a record keyed by none of its ticks' symbols is counted."""
    from aiokafka import AIOKafkaProducer
    from prometheus_client import generate_latest

    topic = "keyed-ticks"
    await _create_topic(kafka_bootstrap, topic, partitions=1)
    t0 = 1_798_794_000_000_000_000
    fen = [{"sym": "FENWORTH~KESMOOR", "ts": t0 + i * 10**9, "seq": i + 1, "kind": "delta",
            "trade_px": 10.0, "trade_qty": 1.0} for i in range(6)]  # fmt: skip
    mar = {"sym": "MARROWAY~KESMOOR", "ts": t0, "seq": 1, "kind": "delta", "trade_px": 20.0, "trade_qty": 2.0}
    sends = [
        (b"FENWORTH~KESMOOR", fen[0]),
        (b"MARROWAY~KESMOOR", fen[1]),  # another symbol's key: counted
        (b"QUILLFERN~KESMOOR", fen[2]),  # counted
        (b"MARROWAY~KESMOOR", [fen[3], mar]),  # a batch keyed by one of its symbols: fine
        (b"QUILLFERN~KESMOOR", [fen[4], mar | {"seq": 2}]),  # none of them: counted
        (None, fen[5]),  # no key: nothing to compare
    ]
    producer = AIOKafkaProducer(bootstrap_servers=kafka_bootstrap)
    await producer.start()
    try:
        for key, value in sends:
            await producer.send_and_wait(topic, msgpack.packb(value), key=key, partition=0)
    finally:
        await producer.stop()
    settings = service_settings(kafka_bootstrap, topic, bars=["volume:1000"], parquet={"dir": tmp_path / "service"})
    runner = build_service(settings)
    summary = await runner.serve()
    assert summary.stats.accepted == 8
    text = generate_latest(runner.metrics.registry).decode()
    assert samples(text)[("barsmith_key_mismatches_total", (("partition", f"{topic}[0]"),))] == 3
    bars = pd.read_parquet(tmp_path / "service")
    # Every tick landed on its own symbol, whatever its key said.
    assert bars.groupby("symbol")["trades"].sum().to_dict() == {"FENWORTH~KESMOOR": 6, "MARROWAY~KESMOOR": 2}


async def test_the_readme_reads_the_bus_as_it_shows(kafka_bootstrap: str, small_feed: Path) -> None:
    """The README's aiokafka example, run as written (only the broker and topic changed),
    prints every committed bar: its spec header, symbol and integer-ns start."""
    from factories import readme_blocks

    await publish_feed([small_feed], kafka(kafka_bootstrap), "readme-ticks", partitions=8)
    settings = service_settings(kafka_bootstrap, "readme-ticks", kafka={"output_topic": "readme-bars"})
    await build_service(settings).serve()
    expected = await read_records(kafka_bootstrap, "readme-bars")
    (block,) = [b for b in readme_blocks("python") if "AIOKafkaConsumer" in b]
    assert 'isolation_level="read_committed"' in block
    code = block.replace('"127.0.0.1:19092"', repr(kafka_bootstrap)).replace(
        'topic: str = "bars"', 'topic: str = "readme-bars"'
    )
    done = await asyncio.to_thread(
        subprocess.run, [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert len(lines) == len(expected) > 0
    spec, symbol, day, clock = lines[0].split()[:4]
    assert spec in SPECS and symbol.endswith("~KESMOOR") and day.startswith("2027-01-01") and clock.endswith("+00:00")


async def test_revisions_on_the_bus_and_in_parquet_are_replays(
    kafka_bootstrap: str, small_feed: Path, tmp_path: Path
) -> None:
    """A feed whose symbol arrives two minutes late throughout (its own order kept):
    the service publishes the same revisions as replay of the same input order, on the
    bus and in Parquet (appended rows), and read_bars gives the latest of each."""
    import gzip

    from barsmith import read_bars
    from barsmith.ingest.framing import FrameReader

    records = []
    with gzip.open(small_feed) as handle:
        for batch, _, _ in FrameReader(handle).batches(10_000):
            records += [r.to_wire() if hasattr(r, "to_wire") else r for r in batch]
    # The late symbol shares its partition with the most traffic of other symbols: lateness
    # is per partition (the service's and replay --partitions' watermark).
    per = Counter(r["sym"] for r in records if isinstance(r, dict) and "sym" in r)

    def neighbours(sym: str) -> int:
        return sum(n for other, n in per.items() if other != sym and partition_for(other, 8) == partition_for(sym, 8))

    late = max(sorted(per), key=neighbours)
    keyed = []
    for i, record in enumerate(records):
        delay = 0
        if isinstance(record, dict) and record.get("sym") == late:
            delay = 1_500  # records: about two minutes of this feed
        keyed.append((i + delay, i, record))
    feed = tmp_path / "straggling.msgpack"
    feed.write_bytes(b"".join(msgpack.packb(r, use_bin_type=True) for _, _, r in sorted(keyed, key=lambda k: k[:2])))
    config = tmp_path / "revisions.toml"
    config.write_text("revision_window_ms = 600000\n")

    await publish_feed([feed], kafka(kafka_bootstrap), "straggling-ticks", partitions=8)
    settings = service_settings(
        kafka_bootstrap,
        "straggling-ticks",
        revision_window_ms=600_000,
        kafka={"output_topic": "revised-bars"},
        parquet={"dir": tmp_path / "service"},
    )
    await build_service(settings).serve()
    await asyncio.to_thread(
        replay_files, [feed], tmp_path / "replay", config_file=config, bars=SPECS, partitions=8, replace=True
    )
    order = [*KEY, "revision"]
    expected = pd.read_parquet(tmp_path / "replay").sort_values(order).reset_index(drop=True)
    assert (expected["revision"] > 0).any(), "no straggler landed inside the window"
    got = parquet_frame(tmp_path / "service").sort_values(order).reset_index(drop=True)
    assert_same_bars(expected, got)
    bus = await read_topic(kafka_bootstrap, "revised-bars", tuple(expected.columns))
    assert_same_bars(expected, bus.sort_values(order).reset_index(drop=True))
    latest = read_bars(tmp_path / "service")
    minutes = latest[latest["spec"] == "time:1m"]
    assert not minutes.duplicated(["symbol", "start"]).any()
    highest = expected[expected["spec"] == "time:1m"].groupby(["symbol", "start"])["revision"].max()
    assert minutes.set_index(["symbol", "start"])["revision"].sort_index().equals(highest.sort_index())
