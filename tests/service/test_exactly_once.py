"""Exactly-once output on a real broker: crashes, a broker restart and a rebalance leave the
committed output (bus, read_committed, and Parquet) equal to ``barsmith replay`` of the same feed.

The reference is the replay of the same feed split into the same 8 partitions; what makes it an
outside check is the guarantee's own definition (an uninterrupted run) plus Kafka's
transactional read semantics: ``isolation_level=read_committed`` readers never see aborted
records (Kafka documentation, "Transactions" / KIP-98).
"""

from __future__ import annotations

import asyncio
import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from conftest import Broker
from factories import free_port_pair
from test_service import (
    DEMO,
    SPECS,
    _create_topic,
    assert_same_bars,
    kafka,
    parquet_frame,
    read_records,
    read_topic,
    replay_frame,
    samples,
    scrape,
)

from barsmith.tools.feeds import publish_feed

# A dead member is noticed after the session timeout; the broker's minimum is 6 s.
FAST_GROUP_ENV = {"BARSMITH_KAFKA__SESSION_TIMEOUT_MS": "6000"}


def service_args(bootstrap: str, topic: str, group: str, out: Path, port: int, *extra: str) -> list[str]:
    return [
        sys.executable, "-m", "barsmith", "run", "--bootstrap", bootstrap, "--input-topic", topic,
        "--group", group, "--output-topic", f"{topic}-bars", "--parquet-dir", str(out),
        "--metrics-port", str(port), "--checkpoint-interval", "1s",
        *[a for s in SPECS for a in ("--bars", s)], *extra,
    ]  # fmt: skip


def spawn(args: list[str], log: Path) -> subprocess.Popen[bytes]:
    with log.open("ab") as handle:  # the child keeps its own descriptor
        return subprocess.Popen(args, stdout=handle, stderr=handle, env=dict(os.environ, **FAST_GROUP_ENV))


def wait_ready(port: int, proc: subprocess.Popen[bytes], log: Path, timeout_s: float = 90) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        assert proc.poll() is None, f"the service exited early:\n{log.read_text()[-3000:]}"
        try:
            if scrape(port, "/readyz")[0] == 200:
                return
        except OSError:
            pass
        assert time.monotonic() < deadline, f"the service did not become ready:\n{log.read_text()[-3000:]}"
        time.sleep(0.2)


def consumed(port: int) -> float:
    """Messages the service has processed (its accepted + rejected + duplicate counters)."""
    try:
        metrics = samples(scrape(port)[1])
    except OSError:
        return 0.0
    return sum(v for (name, labels), v in metrics.items() if name == "barsmith_messages_total"
               and dict(labels)["outcome"] in ("accepted", "duplicate", "rejected"))  # fmt: skip


def paced_publisher(bootstrap: str, topic: str) -> threading.Thread:
    """A thread publishing the demo feed (75 minutes of event time) at 150x: about 30 s."""
    return threading.Thread(
        target=lambda: asyncio.run(publish_feed([DEMO], kafka(bootstrap), topic, partitions=8, speed=150.0))
    )


def wait_consumed(port: int, proc: subprocess.Popen[bytes], log: Path, at_least: int, timeout_s: float = 60) -> None:
    """Wait until the service at ``port`` has handled ``at_least`` messages (mid-stream)."""
    deadline = time.monotonic() + timeout_s
    while consumed(port) < at_least:
        assert time.monotonic() < deadline and proc.poll() is None, log.read_text()[-3000:]
        time.sleep(0.1)


def drain(args: list[str], log: Path, timeout_s: float = 240) -> None:
    """Run the service in drain mode to the end of its input; it must exit 0."""
    proc = spawn([*args, "--exit-when-idle", "6s"], log)
    try:
        assert proc.wait(timeout=timeout_s) == 0, log.read_text()[-4000:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def assert_exact(bootstrap: str, topic: str, out: Path, expected: Any) -> None:
    assert_same_bars(expected, asyncio.run(read_topic(bootstrap, f"{topic}-bars")))
    assert_same_bars(expected, parquet_frame(out))  # also: no temporary file left visible


async def latest_checkpoints(bootstrap: str, state_topic: str) -> dict[str, bytes]:
    """The last committed checkpoint per key on the state topic."""
    return {record.key.decode(): record.value for record in await read_records(bootstrap, state_topic)}


def book_rows(engine: Any) -> dict[str, tuple[Any, ...]]:
    return {
        book.symbol: (book.status, book.last_seq, book.last_ts, book.bid_px, book.bid_qty, book.ask_px, book.ask_qty)
        for book in engine.books()
    }


def assert_books_equal_replay(bootstrap: str, topic: str, group: str) -> None:
    """The books in the final checkpoints equal the books of an uninterrupted replay, per partition."""
    from barsmith.checkpoint import decode_checkpoint
    from barsmith.runner import Runner
    from barsmith.settings import load_settings
    from barsmith.sinks.base import MemorySink
    from barsmith.sources.files import FileSource

    settings = load_settings(bars=SPECS)
    specs, lateness = settings.bar_specs(), settings.lateness_ns
    replay = Runner(specs, lateness, FileSource([DEMO], partitions=8), [MemorySink()], MemorySink())
    replay.run()
    stored = asyncio.run(latest_checkpoints(bootstrap, f"{group}.barsmith-state"))
    assert stored, "no checkpoints"
    for partition in range(8):  # a partition that never had input has neither a checkpoint nor books
        data = stored.get(f"{topic}[{partition}]")
        books = book_rows(decode_checkpoint(data, specs, lateness)[0]) if data is not None else {}
        expected = replay.engines.get(f"p{partition}")
        assert books == (book_rows(expected) if expected is not None else {}), f"partition {partition}"


def test_crash_loop_output_is_exactly_replay(kafka_bootstrap: str, tmp_path: Path) -> None:
    """SIGKILL the service at random moments (≥ 10 kills, seed printed) while the feed arrives;
    after a final run to the end, bus and Parquet hold exactly replay's bars, and the books in
    the final checkpoints are replay's books."""
    seed = int(os.environ.get("BARSMITH_CRASH_SEED") or random.SystemRandom().randrange(2**32))
    print(f"crash-loop seed {seed} (rerun with BARSMITH_CRASH_SEED={seed})")
    rng = random.Random(seed)
    topic, out, log = "crash-ticks", tmp_path / "bars", tmp_path / "service.log"
    asyncio.run(_create_topic(kafka_bootstrap, topic))
    publisher = paced_publisher(kafka_bootstrap, topic)
    publisher.start()
    kills = 0
    try:
        while kills < 10:
            port = free_port_pair()
            proc = spawn(service_args(kafka_bootstrap, topic, "g-crash", out, port), log)
            if rng.random() < 0.25:
                time.sleep(rng.uniform(0.0, 2.0))  # during start-up, assignment or restore
            else:
                wait_ready(port, proc, log)
                time.sleep(rng.uniform(0.0, 3.0))  # while consuming, building and checkpointing
            seen = consumed(port)
            proc.send_signal(signal.SIGKILL)
            proc.wait()
            kills += 1
            print(f"kill {kills}: this process had handled {seen:,.0f} messages")
    finally:
        publisher.join()
    drain(service_args(kafka_bootstrap, topic, "g-crash", out, free_port_pair()), log)
    text = log.read_text()
    assert text.count("restored from its checkpoint") >= 3, "the kills should have landed after checkpoints"
    assert_exact(kafka_bootstrap, topic, out, replay_frame(DEMO, tmp_path / "replay"))
    assert_books_equal_replay(kafka_bootstrap, topic, "g-crash")


def test_broker_restart_mid_run(kafka_broker: Broker, tmp_path: Path) -> None:
    """The broker stops and starts again while the service works: the service keeps its
    process, reconnects, rewinds what the broker never committed, and the output is exact."""
    bootstrap = kafka_broker.bootstrap
    topic, out, log = "restart-ticks", tmp_path / "bars", tmp_path / "service.log"
    asyncio.run(publish_feed([DEMO], kafka(bootstrap), topic, partitions=8))
    port = free_port_pair()
    proc = spawn([*service_args(bootstrap, topic, "g-restart", out, port), "--exit-when-idle", "40s"], log)
    try:
        wait_ready(port, proc, log)
        wait_consumed(port, proc, log, 30_000)  # mid-run: it has started on the feed, far from done
        kafka_broker.stop()
        time.sleep(3)
        assert proc.poll() is None, "the service must survive the outage"
        done = kafka_broker.start()
        assert done.returncode == 0, done.stderr[-3000:]
        assert proc.wait(timeout=240) == 0, log.read_text()[-4000:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert_exact(bootstrap, topic, out, replay_frame(DEMO, tmp_path / "replay"))
    assert_books_equal_replay(bootstrap, topic, "g-restart")


def test_rebalance_second_instance_joins_and_leaves(kafka_bootstrap: str, tmp_path: Path) -> None:
    """A second instance joins mid-stream (taking half the partitions, open bars included) and
    later leaves with SIGTERM (handing them back); the output is exact."""
    topic, out = "rebalance-ticks", tmp_path / "bars"
    asyncio.run(_create_topic(kafka_bootstrap, topic))
    publisher = paced_publisher(kafka_bootstrap, topic)  # input keeps arriving while the group changes
    port_a, port_b = free_port_pair(), free_port_pair()
    log_a, log_b = tmp_path / "a.log", tmp_path / "b.log"
    first = spawn([*service_args(kafka_bootstrap, topic, "g-rebalance", out, port_a), "--exit-when-idle", "10s"], log_a)
    second = None
    try:
        wait_ready(port_a, first, log_a)
        publisher.start()
        wait_consumed(port_a, first, log_a, 20_000, timeout_s=180)
        second = spawn(service_args(kafka_bootstrap, topic, "g-rebalance", out, port_b), log_b)
        wait_ready(port_b, second, log_b)
        wait_consumed(port_b, second, log_b, 2_000)
        second.send_signal(signal.SIGTERM)
        assert second.wait(timeout=30) == 0, log_b.read_text()[-3000:]
        publisher.join()
        assert first.wait(timeout=240) == 0, log_a.read_text()[-3000:]
    finally:
        if publisher.is_alive():
            publisher.join()
        for proc in (first, second):
            if proc is not None and proc.poll() is None:
                proc.kill()
                proc.wait()
    assert "restored from its checkpoint" in log_a.read_text(), "the first instance should take back checkpoints"
    assert_exact(kafka_bootstrap, topic, out, replay_frame(DEMO, tmp_path / "replay"))
    assert_books_equal_replay(kafka_bootstrap, topic, "g-rebalance")


def test_at_least_once_mode_is_still_available(kafka_bootstrap: str, tmp_path: Path) -> None:
    """--delivery at-least-once: no checkpoints or transactions; an uninterrupted run is still exact."""
    topic, out, log = "alo-ticks", tmp_path / "bars", tmp_path / "service.log"
    asyncio.run(publish_feed([DEMO], kafka(kafka_bootstrap), topic, partitions=8))
    drain([*service_args(kafka_bootstrap, topic, "g-alo", out, free_port_pair()), "--delivery", "at-least-once"], log)
    assert "restored from" not in log.read_text()
    assert_exact(kafka_bootstrap, topic, out, replay_frame(DEMO, tmp_path / "replay"))


async def test_unreadable_checkpoint_stops_the_service_with_advice(kafka_bootstrap: str, tmp_path: Path) -> None:
    """A checkpoint of a format version this barsmith does not read (here: an older one) is
    refused with a message saying what to do — never misread, never silently ignored."""
    import msgpack
    from aiokafka import AIOKafkaProducer
    from test_service import service_settings

    from barsmith.bus import STATE_TOPIC_CONFIGS, ensure_topic, partition_for
    from barsmith.checkpoint import encode_checkpoint
    from barsmith.engine import Engine
    from barsmith.errors import CheckpointError
    from barsmith.service.app import build_service

    topic = "upgrade-ticks"
    settings = service_settings(kafka_bootstrap, topic, parquet={"dir": tmp_path / "bars"})
    await ensure_topic(settings.kafka, topic, 1)
    partitions = await ensure_topic(settings.kafka, settings.state_topic, 8, STATE_TOPIC_CONFIGS)
    old = msgpack.unpackb(encode_checkpoint(Engine(settings.bar_specs(), settings.lateness_ns), {"offset": 0}))
    old["version"] = 0  # as if written by an earlier format
    producer = AIOKafkaProducer(bootstrap_servers=kafka_bootstrap)
    await producer.start()
    try:
        stream = f"{topic}[0]"
        await producer.send_and_wait(
            settings.state_topic, msgpack.packb(old), key=stream.encode(), partition=partition_for(stream, partitions)
        )
    finally:
        await producer.stop()
    with pytest.raises(CheckpointError, match=r"version 0 is not readable.*replay the input with the previous version"):
        await asyncio.wait_for(build_service(settings).serve(), timeout=60)


def test_fenced_partition_is_taken_back_from_its_checkpoint(kafka_bootstrap: str, tmp_path: Path) -> None:
    """Another producer takes one partition's transactional id mid-stream (a zombie's view of
    the world): the service's transaction for it fails as fenced, the open transaction is
    aborted by the broker, and — since the group still assigns the partition here — the service
    takes it back from its last checkpoint. The output is exact."""
    from aiokafka import AIOKafkaProducer

    topic, out, log = "fence-ticks", tmp_path / "bars", tmp_path / "service.log"
    asyncio.run(_create_topic(kafka_bootstrap, topic))
    publisher = paced_publisher(kafka_bootstrap, topic)
    port = free_port_pair()
    proc = spawn([*service_args(kafka_bootstrap, topic, "g-fence", out, port), "--exit-when-idle", "20s"], log)

    # Fence the partition of the demo's busiest listing: it has input after the fence.
    import gzip
    from collections import Counter

    from barsmith.bus import partition_for
    from barsmith.ingest.framing import FrameReader

    with gzip.open(DEMO) as handle:
        listings = Counter(
            getattr(r, "sym", None) for batch, _, _ in FrameReader(handle).batches(10_000) for r in batch
        )
    busiest = max((n, sym) for sym, n in listings.items() if isinstance(sym, str))[1]
    fenced = partition_for(busiest, 8)

    async def fence() -> None:
        zombie = AIOKafkaProducer(bootstrap_servers=kafka_bootstrap, transactional_id=f"g-fence.{topic}.{fenced}")
        await zombie.start()  # init_transactions: bumps the epoch, aborts the service's open transaction
        await zombie.stop()

    try:
        wait_ready(port, proc, log)
        publisher.start()
        wait_consumed(port, proc, log, 20_000, timeout_s=180)
        asyncio.run(fence())
        publisher.join()
        assert proc.wait(timeout=240) == 0, log.read_text()[-4000:]
    finally:
        if publisher.is_alive():
            publisher.join()
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    text = log.read_text()
    assert "fenced" in text and "taking it back" in text and "on rewind" in text, text[-4000:]
    assert_exact(kafka_bootstrap, topic, out, replay_frame(DEMO, tmp_path / "replay"))
    assert_books_equal_replay(kafka_bootstrap, topic, "g-fence")
