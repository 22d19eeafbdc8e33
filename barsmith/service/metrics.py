"""Prometheus metrics of the service. Names follow Prometheus' naming practice: the
``barsmith_`` prefix, base units in the name (``_seconds``, ``_bytes``; ``_records``
for Kafka records), ``_total`` for counters and nothing else. Label values are bounded
by the configuration or by enums, never by the data: ``partition`` by the assigned
input partitions, ``spec`` by the configured bar specs, ``sink`` by the configured
sinks, ``reason``, ``outcome``, ``state`` and ``status`` by fixed sets
(``tests/service/test_metrics_names.py`` checks a real scrape against these rules).

Engine counters are read from the engines' own statistics at scrape time (a custom
collector), so the per-tick path pays nothing for them.
"""

from __future__ import annotations

import math
import time
from bisect import bisect_left
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.registry import Collector
from prometheus_client.utils import floatToGoString

from barsmith.bars.record import Bar
from barsmith.engine import Engine, EngineStats
from barsmith.service.partitions import PartitionState

_le_label: Callable[[float], str] = floatToGoString  # a bucket's bound as the library writes it
# Close-to-publish delays: sub-millisecond up to tens of seconds.
_DELAY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
_SIZE_BUCKETS = tuple(float(2**k) for k in range(10, 27, 2))  # 1 KiB .. 64 MiB
_EVENT_BUCKETS = (0.1, 0.25, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0, 30.0, 60.0, 120.0, 300.0)


class PartitionView:
    """What the collector reads at scrape time, as plain callables: this process's
    counters, the engines by stream, each partition's lag, partitions by state."""

    def __init__(
        self,
        totals: Callable[[], EngineStats],
        engines: Callable[[], Mapping[str, Engine]],
        lags: Callable[[], Mapping[str, int | None]],
        states: Callable[[], Mapping[PartitionState, int]] = dict,
        key_mismatches: Callable[[], Mapping[str, int]] = dict,
    ) -> None:
        self.totals = totals
        self.engines = engines
        self.lags = lags
        self.states = states
        self.key_mismatches = key_mismatches


class _EngineCollector(Collector):
    def __init__(self, view: PartitionView) -> None:
        self._view = view

    def collect(self) -> Iterator[Metric]:
        stats = self._view.totals()
        messages = CounterMetricFamily(
            "barsmith_messages", "Tick messages by outcome (gap and late are also accepted)", labels=["outcome"]
        )
        messages.add_metric(["accepted"], stats.accepted)
        messages.add_metric(["duplicate"], stats.duplicates)
        messages.add_metric(["gap"], stats.gaps)
        messages.add_metric(["rejected"], sum(stats.rejected.values()))
        messages.add_metric(["late"], stats.late)
        yield messages
        rejects = CounterMetricFamily("barsmith_rejects", "Rejected records by reason", labels=["reason"])
        for reason, count in sorted(stats.rejected.items()):
            rejects.add_metric([reason], count)
        yield rejects
        closed = CounterMetricFamily(
            "barsmith_bars_closed",
            "Bars closed by the engines, by spec (delivered ones: barsmith_bars_delivered_total)",
            labels=["spec"],
        )
        for spec, count in sorted(stats.bars.items()):
            closed.add_metric([spec], count)
        yield closed
        mismatches = CounterMetricFamily(
            "barsmith_key_mismatches",
            "Records whose key is none of their ticks' symbols (the value's sym decides), by partition",
            labels=["partition"],
        )
        for name, count in sorted(self._view.key_mismatches().items()):
            mismatches.add_metric([name], count)
        yield mismatches

        lag = GaugeMetricFamily(
            "barsmith_consumer_lag_records", "Kafka records behind the partition's high watermark", labels=["partition"]
        )
        for name, value in sorted(self._view.lags().items()):
            if value is not None:
                lag.add_metric([name], value)
        yield lag
        partitions = GaugeMetricFamily("barsmith_partitions", "Held input partitions by state", labels=["state"])
        by_state = dict.fromkeys(PartitionState, 0) | dict(self._view.states())
        for state, count in by_state.items():
            partitions.add_metric([state.value], count)
        yield partitions
        watermark = GaugeMetricFamily(
            "barsmith_watermark_seconds",
            "Largest accepted event time, per partition (Unix seconds)",
            labels=["partition"],
        )
        books = {"live": 0, "resyncing": 0}
        for name, engine in sorted(self._view.engines().items()):
            if engine.watermark_ns:
                watermark.add_metric([name], engine.watermark_ns / 1e9)
            for book in engine.books():
                books[book.status.value] += 1
        yield watermark
        book_gauge = GaugeMetricFamily("barsmith_books", "Symbol books by status", labels=["status"])
        for status, count in books.items():
            book_gauge.add_metric([status], count)
        yield book_gauge


class PlainHistogram:
    """A histogram without labels for the per-bar path: bucket counts in a list, exported
    by a collector at scrape time (the scrape runs on the event loop, as every
    observation does, so no lock is needed)."""

    __slots__ = ("bounds", "counts", "doc", "name", "sum")

    def __init__(self, name: str, doc: str, buckets: Iterable[float]) -> None:
        self.name = name
        self.doc = doc
        self.bounds = tuple(sorted(float(b) for b in buckets))
        self.counts = [0] * (len(self.bounds) + 1)  # the last one: above every bound (+Inf)
        self.sum = 0.0

    def observe(self, value: float) -> None:
        """Count ``value`` in the first bucket whose upper bound it does not exceed."""
        self.counts[bisect_left(self.bounds, value)] += 1
        self.sum += value

    def metric(self) -> HistogramMetricFamily:
        """The cumulative buckets, count and sum, as the text format shows a histogram."""
        family = HistogramMetricFamily(self.name, self.doc)
        buckets: list[tuple[str, float]] = []
        total = 0
        for bound, count in zip((*self.bounds, math.inf), self.counts, strict=True):
            total += count
            buckets.append((_le_label(bound), total))
        family.add_metric([], buckets, self.sum)
        return family


class PlainHistograms(Collector):
    """Exports :class:`PlainHistogram` objects from a registry."""

    def __init__(self, histograms: Sequence[PlainHistogram]) -> None:
        self._histograms = tuple(histograms)

    def collect(self) -> Iterator[Metric]:
        for histogram in self._histograms:
            yield histogram.metric()


class ServiceMetrics:
    """The service's registry and the metrics it updates directly."""

    def __init__(self, view: PartitionView) -> None:
        self.registry = CollectorRegistry()
        self.registry.register(_EngineCollector(view))
        self.bars = Counter(
            "barsmith_bars_delivered",
            "Bars handed to a sink, by spec and sink (closed ones: barsmith_bars_closed_total)",
            ["spec", "sink"],
            registry=self.registry,
        )
        self.sink_errors = Counter("barsmith_sink_errors", "Sink failures, by sink", ["sink"], registry=self.registry)
        self.commits = Counter(
            "barsmith_offset_commits", "Offset commits to the consumer group", registry=self.registry
        )
        # Observed for every bar the broker acknowledges: kept as plain counts and read at
        # scrape time (the client library's histograms cost ~2 µs an observation, under
        # a lock; two per bar was ~5 % of the service's time at 64 ticks a record).
        self.publish_delay = PlainHistogram(
            "barsmith_bar_publish_delay_seconds",
            "Wall time from a bar's close to the broker's acknowledgement",
            _DELAY_BUCKETS,
        )
        self.event_to_publish = PlainHistogram(
            "barsmith_event_to_publish_seconds",
            "Wall clock at publish minus the bar's end (event time); meaningful when event time is wall time",
            _EVENT_BUCKETS,
        )
        self.registry.register(PlainHistograms([self.publish_delay, self.event_to_publish]))

        self.transactions = Counter(
            "barsmith_transactions",
            "Exactly-once checkpoint transactions, by outcome (committed, aborted)",
            ["outcome"],
            registry=self.registry,
        )
        self.checkpoint_bytes = Histogram(
            "barsmith_checkpoint_size_bytes",
            "Size of each committed partition checkpoint",
            buckets=_SIZE_BUCKETS,
            registry=self.registry,
        )
        self.checkpoint_seconds = Histogram(
            "barsmith_checkpoint_duration_seconds",
            "Wall time of one partition checkpoint: staging, encoding and the transaction's commit",
            buckets=_DELAY_BUCKETS,
            registry=self.registry,
        )
        self.restores = Counter(
            "barsmith_checkpoint_restores",
            "Engine states restored from a checkpoint, by reason (assignment, rewind)",
            ["reason"],
            registry=self.registry,
        )
        self.offsets_rewound = Counter(
            "barsmith_offsets_rewound",
            "Input records consumed again because a restore moved a partition back",
            registry=self.registry,
        )
        # Known label values exist from the start (at zero), so rates and alerts see them.
        for outcome in ("committed", "aborted"):
            self.transactions.labels(outcome=outcome)
        for reason in ("assignment", "rewind"):
            self.restores.labels(reason=reason)

    def observe_publish(self, bar: Bar, delay_s: float) -> None:
        """The broker acknowledged ``bar``, ``delay_s`` after it was handed to the bus sink."""
        self.publish_delay.observe(delay_s)
        self.event_to_publish.observe(max(0.0, time.time() - bar.end / 1e9))

    def count_bars(self, sink: str, bars: Iterable[Any]) -> None:
        counts: dict[str, int] = {}
        for bar in bars:
            counts[bar.spec] = counts.get(bar.spec, 0) + 1
        for spec, count in counts.items():
            self.bars.labels(spec=spec, sink=sink).inc(count)
