"""Both delivery strategies without a broker: the service on an in-memory topic
(``MemoryLiveSource``), in-memory sinks and, for exactly-once, an in-memory checkpoint
bus. Crashes, failed transactions, fencing and a rebalance must leave the committed
output equal to an uninterrupted run — the guarantee's own definition; the real-broker
versions of these tests are in test_exactly_once.py."""

from __future__ import annotations

import asyncio
import functools
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pytest
from aiokafka.errors import KafkaTimeoutError
from factories import run_engine
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from barsmith.bars.bar import Bar
from barsmith.bars.family import SpecContext
from barsmith.bars.spec import parse_specs
from barsmith.bus import MemoryCheckpointBus, partition_for, symbol_of
from barsmith.engine import Engine
from barsmith.runner import RunSummary
from barsmith.service.daemon import ServiceRunner
from barsmith.service.delivery import AtLeastOnce
from barsmith.service.exactly_once import ExactlyOnce
from barsmith.settings import Delivery, Settings, load_settings
from barsmith.sinks.base import MemoryCheckpointedSink, MemorySink
from barsmith.sources.memory import MemoryLiveSource, MemoryTopic
from barsmith.tools.synth import SynthConfig, generate

SPECS = ["time:1m", "volume:5000", "notional:1e6"]
PARTITIONS = 4


@pytest.fixture(scope="module")
def feed() -> list[list[Any]]:
    """A synthetic feed split into partitions by symbol, as ``publish`` places it, with
    two malformed records."""
    parts: list[list[Any]] = [[] for _ in range(PARTITIONS)]
    for record in generate(SynthConfig(messages=8_000, symbols=16, duration_s=900, seed=5)):
        parts[partition_for(symbol_of(record), PARTITIONS)].append(record)
    parts[0].insert(30, {"sym": "BROKEN~KESMOOR", "seq": 1, "kind": "delta"})  # no ts
    parts[1].insert(200, 42)  # not a map
    return parts


def halves(feed: list[list[Any]]) -> tuple[list[list[Any]], list[list[Any]]]:
    """Each partition's input in two parts: the test publishes the second part after it
    did something mid-stream, so that the service is still working when it happens."""
    return [p[: len(p) // 2] for p in feed], [p[len(p) // 2 :] for p in feed]


def settings(delivery: Delivery, bars: list[str] = SPECS, revision_window_ms: int = 0, **service: Any) -> Settings:
    return load_settings(
        bars=bars,
        revision_window_ms=revision_window_ms,
        kafka={"input_topics": ["ticks"], "group_id": "g-memory", "session_timeout_ms": 1_000},
        metrics={"port": None},
        checkpoint={"interval_s": 0.02},
        # The idle rule compares event time with the wall clock: kept out of the way.
        service={
            "delivery": delivery,
            "housekeeping_interval_s": 0.005,
            "idle_close_s": 3_600.0,
            "exit_when_idle_s": 0.3,
            **service,
        },
    )


@dataclass
class Bus:
    """The in-memory bus the service instances of a test share: input topic, output (a
    checkpointed sink: bars visible once committed) and the checkpoint store."""

    topic: MemoryTopic
    sink: MemoryCheckpointedSink
    checkpoints: MemoryCheckpointBus


def memory_bus(partitions: list[list[Any]]) -> Bus:
    topic = MemoryTopic("ticks", partitions)
    return Bus(topic, MemoryCheckpointedSink(), MemoryCheckpointBus(topic.committed))


def exactly_once(
    bus: Bus, assigned: list[int] | None = None, bars: list[str] = SPECS, revision_window_ms: int = 0, **service: Any
) -> ServiceRunner:
    cfg = settings(Delivery.EXACTLY_ONCE, bars, revision_window_ms, **service)
    source = MemoryLiveSource(bus.topic, pause_on_assign=True, assigned=assigned, batch_records=50)
    strategy = functools.partial(ExactlyOnce, cfg, [bus.sink], bus.checkpoints)
    return ServiceRunner(cfg, source, [bus.sink], bus.sink, strategy)


async def mid_stream(
    feed: list[list[Any]], when: Callable[[Bus], bool], act: Callable[[Bus], None], **service: Any
) -> tuple[Bus, ServiceRunner, asyncio.Task[RunSummary]]:
    """An exactly-once service on the first half of each partition; once ``when`` holds,
    ``act``, then the rest of the input arrives (so the service is still at work)."""
    first, rest = halves(feed)
    bus = memory_bus(first)
    runner = exactly_once(bus, **{"exit_when_idle_s": 0.6, **service})
    task = asyncio.create_task(runner.serve())
    await until(lambda: when(bus), task, "the moment never came")
    act(bus)
    bus.topic.publish(rest)
    return bus, runner, task


def at_least_once(topic: MemoryTopic, sink: MemorySink, **service: Any) -> ServiceRunner:
    cfg = settings(Delivery.AT_LEAST_ONCE, **service)
    source = MemoryLiveSource(topic, batch_records=50)
    return ServiceRunner(cfg, source, [sink], sink, functools.partial(AtLeastOnce, cfg))


def expected_bars(feed: list[list[Any]]) -> list[tuple[Any, ...]]:
    """The uninterrupted run: one engine per partition over all of its input, finished."""
    bars: list[Bar] = []
    for records in feed:
        bars += run_engine(records, SPECS, lateness_ns=2_000_000_000)[0]
    return rows(bars)


def rows(bars: list[Bar]) -> list[tuple[Any, ...]]:
    # Sorted by their text: revisions of one bar differ only in columns that may be null.
    return sorted((tuple(bar.as_dict().values()) for bar in bars), key=repr)


async def until(check: Callable[[], bool], task: asyncio.Task[Any], what: str, timeout_s: float = 30) -> None:
    deadline = time.monotonic() + timeout_s
    while not check():
        assert not task.done(), task.result()
        assert time.monotonic() < deadline, what
        await asyncio.sleep(0.002)


async def crash_when(runner: ServiceRunner, bus: Bus, records: int) -> None:
    """Run until a commit of this service brings the committed offsets to ``records``,
    then stop without any final flush (a kill between two batches: what is not
    checkpointed is lost with the process). The kill acts at that commit: a test that
    polled for the moment could wake up after the service had read everything."""
    topic = bus.topic

    def kill() -> None:
        if sum(topic.committed.values()) >= records and runner.total_stats().records > 0 and not runner.force_exit:
            runner.handle_exit()
            runner.handle_exit()  # the second signal: force_exit skips the final flush

    bus.checkpoints.after_commit = kill
    try:
        task = asyncio.create_task(runner.serve())
        await until(lambda: runner.force_exit, task, "the service did not get that far")
        await asyncio.wait_for(task, timeout=10)
    finally:
        bus.checkpoints.after_commit = None


async def trickle(topic: MemoryTopic, feed: list[list[Any]], steps: int = 100, pause_s: float = 0.005) -> None:
    """Publish the feed in ``steps`` slices, a share of every partition each ``pause_s``:
    input that keeps arriving while services crash and restart, so that a kill finds
    one mid-stream however fast it reads (a feed there whole is read in one go by a
    compiled build, before its first checkpoint)."""
    done = [0] * len(feed)
    for step in range(1, steps + 1):
        cut = [len(records) * step // steps for records in feed]
        topic.publish([records[a:b] for records, a, b in zip(feed, done, cut, strict=True)])
        done = cut
        await asyncio.sleep(pause_s)


def sample(runner: ServiceRunner, name: str, **labels: str) -> float:
    text = generate_latest(runner.metrics.registry).decode()
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == name and s.labels == labels:
                return float(s.value)
    raise AssertionError(f"no sample {name}{labels}")


async def test_exactly_once_run_gives_the_uninterrupted_bars(feed: list[list[Any]]) -> None:
    bus = memory_bus(feed)
    runner = exactly_once(bus)
    task = asyncio.create_task(runner.serve())
    await until(runner.ready, task, "never ready")
    assert sample(runner, "barsmith_partitions", state="live") == PARTITIONS
    assert sample(runner, "barsmith_partitions", state="restoring") == 0
    summary = await asyncio.wait_for(task, timeout=30)
    assert summary.stats.records == sum(map(len, feed))
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert len(bus.sink.rejects) == 2  # the malformed records, committed once
    # The group's offsets are the checkpoints' offsets: every partition read to its end.
    topic = bus.topic
    assert topic.committed == {topic.stream(p): len(records) for p, records in enumerate(feed)}
    assert set(bus.checkpoints.checkpoints) == {topic.stream(p) for p in range(PARTITIONS)}
    assert sample(runner, "barsmith_transactions_total", outcome="aborted") == 0
    assert sample(runner, "barsmith_checkpoint_restores_total", reason="assignment") == PARTITIONS


async def test_exactly_once_crashes_lose_and_double_nothing(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    """Three kills at different depths, then a run to the end: exactly the uninterrupted
    bars, each once; the restarts continue from the checkpoints, open bars included."""
    caplog.set_level(logging.INFO)
    bus = memory_bus([[] for _ in feed])
    feeder = asyncio.create_task(trickle(bus.topic, feed))
    total = sum(map(len, feed))
    for quarter in (1, 2, 3):
        # Killed at the commit that brings checkpoints past this quarter of the input,
        # once the process did some work of its own.
        runner = exactly_once(bus)
        await crash_when(runner, bus, quarter * total // 4)
    assert 0 < len(bus.sink.bars) < len(expected_bars(feed))
    await asyncio.wait_for(exactly_once(bus).serve(), timeout=30)
    assert feeder.done()
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert "restoring -> live: restored from its checkpoint" in caplog.text


async def test_a_failed_transaction_rewinds_and_the_output_stays_exact(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO)
    bus, runner, task = await mid_stream(
        feed,
        lambda bus: "ticks[1]" in bus.checkpoints.checkpoints,
        lambda bus: bus.checkpoints.fail_next("ticks[1]", KafkaTimeoutError()),
    )
    await asyncio.wait_for(task, timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert sample(runner, "barsmith_transactions_total", outcome="aborted") == 1
    assert sample(runner, "barsmith_checkpoint_restores_total", reason="rewind") == 1
    assert "ticks[1]: live -> failed: transaction failed (KafkaTimeoutError" in caplog.text
    assert "ticks[1]: failed -> live: restored from its checkpoint" in caplog.text


async def test_a_commit_that_landed_but_failed_on_the_client_is_not_done_twice(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    """A commit can time out on the client after the broker took it: the checkpoint and
    the transaction's bars are committed, but the service saw a failure. Rewinding to the
    checkpoint it last saw commit would build and commit that stretch again; the rewind
    takes the stored checkpoint instead, read after its new producer fenced the old one."""
    caplog.set_level(logging.INFO)
    stream = "ticks[1]"

    def land_then_fail(bus: Bus) -> None:
        bus.checkpoints.fail_next(stream, KafkaTimeoutError(), landed=True)
        bus.checkpoints.on_landed = lambda s: bus.sink.committed(s, bus.sink.prepared[s])

    bus, runner, task = await mid_stream(feed, lambda bus: stream in bus.checkpoints.checkpoints, land_then_fail)
    await asyncio.wait_for(task, timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert sample(runner, "barsmith_checkpoint_restores_total", reason="rewind") == 1
    assert f"{stream}: the commit that failed had landed" in caplog.text


async def test_a_failed_send_rewinds_the_partition_from_where_the_checkpoint_says(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    """A send fails in the middle of a batch and the partition rewinds at once (the bus is
    back): the rewind's position stands, not the end of the batch that failed."""
    caplog.set_level(logging.INFO)
    bus, runner, task = await mid_stream(
        feed,
        lambda bus: len(bus.checkpoints.checkpoints) == PARTITIONS,
        lambda bus: bus.sink.fail_next_publish(KafkaTimeoutError()),
    )
    await asyncio.wait_for(task, timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert sample(runner, "barsmith_checkpoint_restores_total", reason="rewind") == 1
    assert "live -> failed: transaction failed (SinkError" in caplog.text


async def test_a_fenced_partition_stands_back_then_is_taken_back(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    """Another producer takes one partition's transactional id; the group still assigns it
    here, so after two session timeouts (here 2 s) it is taken back from its checkpoint."""
    caplog.set_level(logging.INFO)
    bus, runner, task = await mid_stream(
        feed,
        lambda bus: "ticks[2]" in bus.checkpoints.checkpoints,
        lambda bus: bus.checkpoints.fence("ticks[2]"),
        exit_when_idle_s=2.5,  # longer than the 2 s of grace
    )
    await until(lambda: runner.partitions.state("ticks[2]") == "fenced", task, "not fenced")
    assert sample(runner, "barsmith_partitions", state="fenced") == 1
    await asyncio.wait_for(task, timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert "ticks[2]: live -> fenced" in caplog.text
    assert "ticks[2]: fenced -> failed: still assigned here 2 s after being fenced: taking it back" in caplog.text
    assert "ticks[2]: failed -> live: restored from its checkpoint" in caplog.text


async def test_a_rebalance_hands_partitions_over_through_their_checkpoints(feed: list[list[Any]]) -> None:
    """A second member takes half the partitions mid-stream, open bars included."""
    head, rest = halves(feed)
    bus = memory_bus(head)
    first = exactly_once(bus, exit_when_idle_s=0.6)
    second = exactly_once(bus, assigned=[], exit_when_idle_s=0.6)
    tasks = [asyncio.create_task(first.serve()), asyncio.create_task(second.serve())]
    await until(lambda: first.total_stats().records > 1_500, tasks[0], "no progress")
    positions = {stream: _source(first).partitions[stream] for stream in ("ticks[2]", "ticks[3]")}
    await _source(first).revoke([2, 3])
    # The final checkpoints on revocation cover everything the first member processed.
    assert {stream: bus.topic.committed[stream] for stream in positions} == {
        stream: position.next_offset for stream, position in positions.items()
    }
    await _source(second).assign([2, 3])
    assert first.partitions.state("ticks[2]") is None and second.partitions.state("ticks[2]") == "live"
    bus.topic.publish(rest)
    await asyncio.wait_for(asyncio.gather(*tasks), timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert second.total_stats().records > 0
    assert first.total_stats().records + second.total_stats().records == sum(map(len, feed))


async def test_bars_closed_by_the_idle_rule_commit_with_the_next_checkpoint() -> None:
    """Live-dated ticks, then silence: the idle rule closes their time bars, and the next
    checkpoint commits them although no input came (the engine changed, the offset not)."""
    start = (time.time_ns() - 30_000_000_000) // 1_000_000_000 * 1_000_000_000  # whole seconds: 10 bars
    ticks = [
        {"sym": "FENWORTH~KESMOOR", "ts": start + i * 100_000_000, "seq": i + 1, "kind": "delta",
         "trade_px": 10.0 + (i % 7) * 0.25, "trade_qty": 1.0}
        for i in range(100)
    ]  # fmt: skip
    bus = memory_bus([ticks])
    runner = exactly_once(bus, bars=["time:1s"], idle_close_s=0.2, exit_when_idle_s=None)
    task = asyncio.create_task(runner.serve())
    await until(lambda: len(bus.sink.bars) == 10, task, "idle-closed bars were not committed")
    assert all(bar.complete for bar in bus.sink.bars) and sum(bar.trades for bar in bus.sink.bars) == 100
    runner.handle_exit()
    await asyncio.wait_for(task, timeout=10)
    assert len(bus.sink.bars) == 10


async def test_at_least_once_run_commits_what_it_flushed(feed: list[list[Any]]) -> None:
    topic, sink = MemoryTopic("ticks", feed), MemorySink()
    runner = at_least_once(topic, sink)
    task = asyncio.create_task(runner.serve())
    await until(runner.ready, task, "never ready")
    assert sample(runner, "barsmith_partitions", state="live") == PARTITIONS
    await asyncio.wait_for(task, timeout=30)
    assert rows(sink.bars) == expected_bars(feed)
    assert topic.committed == {topic.stream(p): len(records) for p, records in enumerate(feed)}
    assert sink.flushes >= 1 and sample(runner, "barsmith_offset_commits_total") >= 1


async def test_at_least_once_revocation_commits_and_drops_open_bars(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    topic, sink = MemoryTopic("ticks", feed), MemorySink()
    runner = at_least_once(topic, sink, exit_when_idle_s=None)
    task = asyncio.create_task(runner.serve())
    await until(lambda: runner.total_stats().records > 1_000, task, "no progress")
    flushes = sink.flushes
    await _source(runner).revoke([0])
    stream = topic.stream(0)
    assert sink.flushes > flushes  # flushed before the commit
    assert topic.committed[stream] > 0 and runner.partitions.state(stream) is None
    assert f"partition {stream} revoked; its open bars were dropped" in caplog.text
    runner.handle_exit()
    await asyncio.wait_for(task, timeout=10)


async def test_an_unreadable_checkpoint_stops_the_service(feed: list[list[Any]]) -> None:
    from barsmith.errors import CheckpointError

    bus = memory_bus(feed)
    bus.checkpoints.checkpoints["ticks[0]"] = b"\x81\xa6format\xa7unknown"
    with pytest.raises(CheckpointError):
        await asyncio.wait_for(exactly_once(bus).serve(), timeout=10)


def _source(runner: ServiceRunner) -> MemoryLiveSource:
    source = runner.live_source
    assert isinstance(source, MemoryLiveSource)
    return source


def straggling(feed: list[list[Any]], delay: int = 150) -> list[list[Any]]:
    """Each partition's first symbol delivered ``delay`` records late throughout (its own
    order kept): its ticks arrive after their minutes closed -- stragglers."""
    out = []
    for records in feed:
        late_sym = next(symbol_of(r) for r in records if symbol_of(r))
        keyed = [(i + (delay if symbol_of(r) == late_sym else 0), i, r) for i, r in enumerate(records)]
        out.append([r for _, _, r in sorted(keyed, key=lambda k: (k[0], k[1]))])
    return out


async def test_exactly_once_crashes_with_revisions_in_flight_lose_and_double_nothing(feed: list[list[Any]]) -> None:
    """Revisions are output like any other: killed with revised bars not yet committed,
    the service publishes exactly the revisions of an uninterrupted run."""
    window_ms = 10 * 60_000
    parts = straggling(feed)
    bus = memory_bus([[] for _ in parts])
    feeder = asyncio.create_task(trickle(bus.topic, parts))
    total = sum(map(len, parts))
    for third in (1, 2):
        runner = exactly_once(bus, revision_window_ms=window_ms)
        await crash_when(runner, bus, third * total // 3)
    await asyncio.wait_for(exactly_once(bus, revision_window_ms=window_ms).serve(), timeout=30)
    assert feeder.done()
    expected: list[Bar] = []
    for records in parts:
        specs = parse_specs(SPECS, context=SpecContext(revisions=True))
        engine = Engine(specs, 2_000_000_000, None, window_ms * 1_000_000)
        engine.process(records, list(range(len(records))), "p")
        engine.finish()
        expected += engine.take_bars()
    assert any(bar.get("revision", 0) > 0 for bar in expected), "the feed has no straggler inside the window"
    assert rows(bus.sink.bars) == rows(expected)


async def test_a_commit_in_flight_overlaps_processing_and_its_failure_rewinds(
    feed: list[list[Any]], caplog: pytest.LogCaptureFixture
) -> None:
    """A commit's round trips run beside the loop: while one partition's commit is held
    open, its next batches are processed, their bars wait in the engine (no second
    transaction, nothing visible), and then the commit fails: the partition rewinds to
    its last committed checkpoint and the output is still exactly the uninterrupted one."""
    caplog.set_level(logging.INFO)
    bus = memory_bus([[] for _ in feed])
    stream = bus.topic.stream(3)  # the partition with the most input
    gate = asyncio.Event()
    held: list[int] = []

    async def hold(committing: str) -> None:
        if committing == stream and stream in bus.checkpoints.checkpoints and not held:
            held.append(runner.partitions.engines[stream].stats.records)
            await gate.wait()
            raise KafkaTimeoutError()

    bus.checkpoints.before_commit = hold
    # Idle long enough that a slow machine cannot start draining while the commit is held.
    runner = exactly_once(bus, exit_when_idle_s=2.0)
    feeder = asyncio.create_task(trickle(bus.topic, feed))
    task = asyncio.create_task(runner.serve())
    await until(lambda: bool(held), task, "no commit of the partition was held")
    sent = len(bus.sink._for(stream)[0])  # the partition's bars inside its transaction
    commits = len(bus.checkpoints.commits)
    engine = runner.partitions.engines[stream]
    await until(lambda: engine.stats.records > held[0] + 200, task, "processing stalled during the commit")
    others = lambda: [s for s, _ in bus.checkpoints.commits[commits:]]  # noqa: E731
    await until(lambda: bool(others()), task, "the other partitions' commits waited too")
    # The loop went on; the partition's bars waited (none sent, no second commit).
    assert len(bus.sink._for(stream)[0]) == sent and stream not in others()
    gate.set()
    await asyncio.wait_for(feeder, timeout=30)
    await asyncio.wait_for(task, timeout=30)
    assert rows(bus.sink.bars) == expected_bars(feed)
    assert sample(runner, "barsmith_transactions_total", outcome="aborted") == 1
    assert sample(runner, "barsmith_checkpoint_restores_total", reason="rewind") == 1
    assert f"{stream}: live -> failed: transaction failed (KafkaTimeoutError" in caplog.text
