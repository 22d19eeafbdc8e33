"""``barsmith bench --bootstrap HOST:PORT``: the service through a real broker.

* consume-to-bars throughput of the service (bus sink on), in at-least-once and in
  exactly-once delivery (default checkpoint cadence), against a bare aiokafka
  consumer that only decodes the same records — with one tick per record and with
  batches of 64 ticks per record;
* bar-close-to-published latency (p50/p99) while the feed is published paced
  (at-least-once: under exactly-once, bars become visible when their partition's
  checkpoint commits, i.e. within ``checkpoint.interval_s``);
* scale: ``barsmith run --workers 1`` and ``--workers 2`` (processes, exactly-once) on
  the same 8-partition input, throughput read off the workers' own ``/metrics``
  (messages processed) between 10 % and 90 % of the input, so that start-up and the
  group's first rebalance do not count.

One run's figures on this machine; not assertions.
"""

from __future__ import annotations

import asyncio
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

import msgpack

from barsmith.bus.clients import new_consumer, start_client
from barsmith.bus.topics import ensure_topic
from barsmith.service.app import build_service
from barsmith.settings import KafkaSettings, load_settings
from barsmith.tools.feeds import publish_feed
from barsmith.tools.synth import SynthConfig, write_feed

SPECS = ["time:1m", "volume:20000", "notional:2e6"]
# The benchmark's feeds are dated in the past (2026-01-05 09:00 UTC), as recorded data is: the
# service rejects ticks far ahead of the wall clock, and the demo's default date is not past.
START_NS = 1_767_603_600_000_000_000


async def _bare_consume(kafka: KafkaSettings, topic: str, ticks: int) -> float:
    """Ticks/s of a consumer that only decodes (msgpack) what it fetches."""
    consumer = new_consumer(
        kafka,
        f"{kafka.client_id}-bench",
        topic,
        group_id=f"bench-bare-{uuid.uuid4().hex[:8]}",
        auto_offset_reset="earliest",
        max_poll_records=kafka.fetch_max_records,
    )
    await start_client(consumer, kafka, "bare consumer")
    seen = 0
    started: float | None = None
    try:
        while seen < ticks:
            polled = await consumer.getmany(timeout_ms=200, max_records=kafka.fetch_max_records)
            for records in polled.values():
                if started is None:
                    started = time.perf_counter()
                for record in records:
                    value = msgpack.unpackb(record.value, raw=False, strict_map_key=False)
                    seen += len(value) if type(value) is list else 1
    finally:
        await consumer.stop()
    assert started is not None
    return seen / (time.perf_counter() - started)


async def _service_consume(
    bootstrap: str, topic: str, ticks: int, out_topic: str, delivery: str = "at-least-once"
) -> tuple[float, list[float]]:
    """Ticks/s of the service (bars to the bus) and its close-to-ack delays."""
    settings = load_settings(
        bars=SPECS,
        kafka={
            "bootstrap_servers": [bootstrap],
            "input_topics": [topic],
            "group_id": f"bench-svc-{uuid.uuid4().hex[:8]}",
            "output_topic": out_topic,
        },
        metrics={"port": None},
        service={"delivery": delivery},
    )
    delays: list[float] = []
    runner = build_service(settings, on_published=lambda _bar, delay_s: delays.append(delay_s))
    task = asyncio.create_task(runner.serve())
    started: float | None = None
    while runner.total_stats().records < ticks:
        if started is None and runner.total_stats().records > 0:
            started = time.perf_counter()
        if task.done():
            task.result()
        await asyncio.sleep(0.002)
    assert started is not None
    rate = ticks / (time.perf_counter() - started)
    runner.handle_exit()
    await task
    stats = runner.total_stats()
    if stats.accepted < 0.9 * stats.records:
        # A figure over rejected input would measure the reject path, not the service.
        raise RuntimeError(f"the service accepted only {stats.accepted:,} of {stats.records:,} ticks: {stats.rejected}")
    return rate, delays


def _free_port_block(count: int) -> int:
    """A port P such that P .. P+count-1 were free a moment ago."""
    for _ in range(50):
        with socket.socket() as probe:
            probe.bind(("127.0.0.1", 0))
            base = int(probe.getsockname()[1])
        if base + count > 65535:
            continue
        try:
            for port in range(base + 1, base + count):
                with socket.socket() as other:
                    other.bind(("127.0.0.1", port))
        except OSError:
            continue
        return base
    raise OSError("no block of free ports")


def _messages_processed(port: int) -> float:
    """``barsmith_messages_total`` summed over outcomes, from one worker's /metrics (0 while
    it is not up yet)."""
    from urllib.error import URLError
    from urllib.request import urlopen

    from prometheus_client.parser import text_string_to_metric_families

    try:
        with urlopen(f"http://127.0.0.1:{port}/metrics", timeout=1) as response:
            text = response.read().decode()
    except (URLError, OSError):
        return 0.0
    return sum(
        sample.value
        for family in text_string_to_metric_families(text)
        if family.name == "barsmith_messages"
        for sample in family.samples
        if sample.name == "barsmith_messages_total"
    )


async def _scale(bootstrap: str, topic: str, ticks: int, workers: int, tag: str) -> float:
    """Ticks/s of ``barsmith run --workers N`` (exactly-once, bars to the bus) over the
    middle 80 % of the topic's ticks."""
    base = _free_port_block(workers)
    command = [sys.executable, "-m", "barsmith", "run", "--bootstrap", bootstrap, "--input-topic", topic]
    command += ["--output-topic", f"{topic}-{tag}", "--group", f"bench-scale-{tag}", "--metrics-port", str(base)]
    command += [arg for spec in SPECS for arg in ("--bars", spec)]
    command += ["--workers", str(workers), "--delivery", "exactly-once"]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    marks: dict[float, float] = {}
    deadline = time.monotonic() + 600
    try:
        while len(marks) < 2:
            if process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"the {workers}-worker service stopped before the end of the input")
            done = sum([await asyncio.to_thread(_messages_processed, base + i) for i in range(workers)])
            now = time.perf_counter()
            for share in (0.1, 0.9):
                if share not in marks and done >= share * ticks:
                    marks[share] = now
            await asyncio.sleep(0.05)
    finally:
        process.terminate()
        await asyncio.to_thread(process.wait)
    return 0.8 * ticks / (marks[0.9] - marks[0.1])


def _percentile(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


async def _run(bootstrap: str, ticks: int, seed: int, rounds: int = 3) -> list[str]:
    kafka = load_settings(kafka={"bootstrap_servers": [bootstrap]}).kafka
    lines = [f"barsmith bench (bus): {ticks:,} ticks, 8 partitions, broker {bootstrap}, specs {', '.join(SPECS)}"]
    run_id = uuid.uuid4().hex[:8]
    with tempfile.TemporaryDirectory(prefix="barsmith-busbench-") as tmp:
        feed = Path(tmp) / "feed.msgpack"
        write_feed(
            feed,
            SynthConfig(seed=seed, symbols=20, messages=ticks, duration_s=max(1800.0, ticks / 200), start_ns=START_NS),
        )
        for batch in (1, 64):
            topic = f"bench-{run_id}-b{batch}"
            await publish_feed([feed], kafka, topic, partitions=8, batch_ticks=batch)
            # Interleaved rounds, compared by medians: this class of machine varies a lot.
            bares: list[float] = []
            alo: list[float] = []
            eos: list[float] = []
            for round_no in range(rounds):
                bares.append(await _bare_consume(kafka, topic, ticks))
                rate, _ = await _service_consume(bootstrap, topic, ticks, f"{topic}-alo-{round_no}", "at-least-once")
                alo.append(rate)
                rate, _ = await _service_consume(bootstrap, topic, ticks, f"{topic}-eos-{round_no}", "exactly-once")
                eos.append(rate)
            bare, at_least, exactly = statistics.median(bares), statistics.median(alo), statistics.median(eos)

            def rounds_of(a: list[float], b: list[float]) -> str:
                return ", ".join(f"{x / y:.2f}" for x, y in zip(a, b, strict=True))

            lines.append(
                f"{batch:>2} tick(s)/record (medians of {rounds}): bare consumer {bare:10,.0f} ticks/s; barsmith"
                f" at-least-once {at_least:10,.0f} ticks/s, ratio {at_least / bare:.2f}"
                f" (rounds {rounds_of(alo, bares)})"
                f"; exactly-once {exactly:10,.0f} ticks/s, ratio {exactly / bare:.2f} (rounds {rounds_of(eos, bares)})"
                f"; exactly-once / at-least-once {exactly / at_least:.2f} (rounds {rounds_of(eos, alo)})"
            )
            if batch == 64:
                scale = [await _scale(bootstrap, topic, ticks, workers, f"{run_id}-w{workers}") for workers in (1, 2)]
                lines.append(
                    f"scale, 64 ticks/record, 8 partitions, exactly-once processes: 1 worker {scale[0]:10,.0f} ticks/s;"
                    f" 2 workers {scale[1]:10,.0f} ticks/s ({scale[1] / scale[0]:.2f}x; this machine has "
                    f"{os.cpu_count()} cores)"
                )
        # Paced: publish at 20x event time while the service runs; time:1s bars close often.
        paced_n = min(ticks, 60_000)
        paced_feed = Path(tmp) / "paced.msgpack"
        write_feed(
            paced_feed, SynthConfig(seed=seed + 1, symbols=20, messages=paced_n, duration_s=600, start_ns=START_NS)
        )
        topic = f"bench-{run_id}-paced"
        await ensure_topic(kafka, topic, 8)
        service = asyncio.create_task(_service_consume(bootstrap, topic, paced_n, f"{topic}-bars"))
        await asyncio.sleep(3)  # let the service join its group first
        await publish_feed([paced_feed], kafka, topic, partitions=8, speed=20.0)
        _, delays = await service
        worst = max(delays) * 1000 if delays else float("nan")
        lines.append(
            f"paced (20x real time), bar close -> broker ack over {len(delays):,} bars: "
            f"p50 {_percentile(delays, 0.5) * 1000:.1f} ms, p99 {_percentile(delays, 0.99) * 1000:.1f} ms, "
            f"max {worst:.1f} ms, mean {statistics.fmean(delays) * 1000:.1f} ms"
        )
    return lines


def run_bus_bench(bootstrap: str, ticks: int, seed: int) -> list[str]:
    """Run the bus benchmark against the broker at ``bootstrap``; returns report lines."""
    return asyncio.run(_run(bootstrap, ticks, seed))
