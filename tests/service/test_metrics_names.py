"""Every metric the service exposes, as scraped over HTTP from a running service,
follows Prometheus' naming practice (Prometheus documentation, "Metric and label
naming", from memory): the application prefix; base units in the name (seconds,
bytes — never milliseconds or kilobytes); ``_total`` on counters and on nothing else;
label values from bounded sets, never from the data. The service runs on the
in-memory live source (no broker), with its real HTTP endpoint on a free port."""

from __future__ import annotations

import asyncio
import functools
import re
import urllib.request
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from barsmith.book.book import BookStatus
from barsmith.bus import MemoryCheckpointBus, partition_for, symbol_of
from barsmith.ingest.ticks import RejectReason
from barsmith.service.daemon import ServiceRunner
from barsmith.service.exactly_once import ExactlyOnce
from barsmith.service.partitions import PartitionState
from barsmith.settings import load_settings
from barsmith.sinks.base import MemoryCheckpointedSink
from barsmith.sources.memory import MemoryLiveSource, MemoryTopic
from barsmith.tools.synth import SynthConfig, generate

SPECS = ["time:1m", "volume:5000"]
PARTITIONS = 3
NAME = re.compile(r"^barsmith_[a-z][a-z0-9]*(_[a-z0-9]+)*$")
# Units that are not base units: Prometheus wants seconds and bytes.
NOT_BASE_UNITS = {"ms", "milliseconds", "us", "microseconds", "ns", "nanoseconds", "minutes", "hours", "days"}
NOT_BASE_UNITS |= {"kb", "kib", "mb", "mib", "gb", "gib", "percent"}
# A gauge or histogram says what it measures in its last word: a base unit, Kafka
# records, or (a gauge counting things by a label) the things themselves.
UNITS = ("_seconds", "_bytes", "_records", "_ratio")
COUNTED_THINGS = {"barsmith_partitions", "barsmith_books"}
EXPOSED = {
    "barsmith_messages", "barsmith_rejects", "barsmith_bars_closed", "barsmith_bars_delivered",
    "barsmith_key_mismatches", "barsmith_sink_errors", "barsmith_consumer_lag_records",
    "barsmith_watermark_seconds", "barsmith_partitions", "barsmith_books", "barsmith_bar_publish_delay_seconds",
    "barsmith_event_to_publish_seconds", "barsmith_offset_commits", "barsmith_transactions",
    "barsmith_checkpoint_size_bytes", "barsmith_checkpoint_duration_seconds", "barsmith_checkpoint_restores",
    "barsmith_offsets_rewound",
}  # fmt: skip


def naming_problems(name: str, kind: str) -> list[str]:
    """What is wrong with a metric family's name for its type (empty: nothing)."""
    problems = []
    if not NAME.match(name):
        problems.append("not barsmith_ and snake case")
    if set(name.split("_")) & NOT_BASE_UNITS:
        problems.append("not a base unit")
    if kind != "counter" and name.endswith("_total"):
        problems.append(f"_total on a {kind}")
    if kind in ("gauge", "histogram") and not name.endswith(UNITS) and name not in COUNTED_THINGS:
        problems.append("no unit")
    return problems


def bounded_labels(runner: ServiceRunner, topic: MemoryTopic) -> dict[str, set[str]]:
    """Every label a metric may carry, with every value it may take: each set is fixed
    by an enum or by the configuration (specs, sinks, the input partitions)."""
    return {
        "outcome": {"accepted", "duplicate", "gap", "rejected", "late", "committed", "aborted"},
        "reason": {r.value for r in RejectReason} | {"assignment", "rewind"},
        "spec": set(runner.settings.bars),
        "sink": {sink.name for sink in runner.sinks},
        "partition": {topic.stream(p) for p in range(len(topic.records))},
        "state": {s.value for s in PartitionState},
        "status": {s.value for s in BookStatus},
        "le": {"any histogram bucket"},
    }


def scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as response:
        text: str = response.read().decode()
        return text


@pytest.fixture(scope="module")
def feed() -> list[list[Any]]:
    parts: list[list[Any]] = [[] for _ in range(PARTITIONS)]
    for record in generate(SynthConfig(messages=4_000, symbols=9, duration_s=600, seed=3)):
        parts[partition_for(symbol_of(record), PARTITIONS)].append(record)
    parts[0].insert(10, {"sym": "BROKEN~KESMOOR", "seq": 1, "kind": "delta"})  # no ts: a reject
    return parts


async def running_scrape(feed: list[list[Any]]) -> tuple[str, ServiceRunner, MemoryTopic]:
    """The /metrics text of a service that has processed the whole feed."""
    topic = MemoryTopic("ticks", feed)
    sink = MemoryCheckpointedSink()
    settings = load_settings(
        bars=SPECS,
        kafka={"input_topics": ["ticks"], "group_id": "g-names"},
        metrics={"port": 0},
        checkpoint={"interval_s": 0.05},
        service={"housekeeping_interval_s": 0.01, "idle_close_s": 3_600.0},
    )
    strategy = functools.partial(ExactlyOnce, settings, [sink], MemoryCheckpointBus(topic.committed))
    runner = ServiceRunner(settings, MemoryLiveSource(topic, pause_on_assign=True), [sink], sink, strategy)
    task = asyncio.create_task(runner.serve())
    total = sum(map(len, feed))
    while runner.total_stats().records < total or not sink.bars:
        assert not task.done(), task
        await asyncio.sleep(0.01)
    assert runner.metrics_port is not None
    text = await asyncio.to_thread(scrape, runner.metrics_port)
    runner.handle_exit()
    await asyncio.wait_for(task, timeout=30)
    return text, runner, topic


async def test_every_scraped_metric_follows_the_naming_practice(feed: list[list[Any]]) -> None:
    text, runner, topic = await running_scrape(feed)
    families = list(text_string_to_metric_families(text))
    # The client library adds a creation time to each counter and histogram, which the
    # text format shows as a gauge <name>_created: the library's convention, not ours.
    named = {f.name for f in families}
    families = [f for f in families if not (f.name.endswith("_created") and f.name.removesuffix("_created") in named)]
    # Names: the prefix, snake case, only base units.
    assert {f.name for f in families} == EXPOSED
    for family in families:
        assert not naming_problems(family.name, family.type), (family.name, naming_problems(family.name, family.type))
        assert family.documentation, f"{family.name} has no help text"
        if family.type == "counter":
            # The exposition adds _total (and _created) to a counter's samples.
            assert {s.name for s in family.samples} <= {f"{family.name}_total", f"{family.name}_created"}
    # Labels: known names, each with values from a bounded set.
    bounds = bounded_labels(runner, topic)
    seen: dict[str, set[str]] = {}
    for family in families:
        for sample in family.samples:
            for label, value in sample.labels.items():
                assert label in bounds, f"{family.name}: label {label!r} has no known bound"
                seen.setdefault(label, set()).add(value)
    for label, values in seen.items():
        if label != "le":
            assert values <= bounds[label], (label, values - bounds[label])
    # The scrape saw real work: bars closed and delivered, lag and watermark per partition.
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value for f in families for s in f.samples}
    for spec in SPECS:
        assert samples[("barsmith_bars_closed_total", (("spec", spec),))] > 0
        delivered = samples[("barsmith_bars_delivered_total", (("sink", "memory-checkpointed"), ("spec", spec)))]
        assert 0 < delivered <= samples[("barsmith_bars_closed_total", (("spec", spec),))]
    assert seen["partition"] == bounds["partition"]
    assert samples[("barsmith_rejects_total", (("reason", "missing_field"),))] == 1


def test_the_rules_catch_a_bad_name() -> None:
    """The checks above fail on names that break the practice (so they are not vacuous)."""
    assert naming_problems("barsmith_consumer_lag_messages", "gauge")  # a count of Kafka records: _records
    assert naming_problems("barsmith_publish_delay_ms", "histogram")  # seconds, not milliseconds
    assert naming_problems("barsmith_checkpoints_total", "gauge")  # _total is for counters
    assert naming_problems("barsmith_lag", "gauge")  # no unit
    assert naming_problems("bars_closed", "counter")  # no prefix
    assert not naming_problems("barsmith_consumer_lag_records", "gauge")
