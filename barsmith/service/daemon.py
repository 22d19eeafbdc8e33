"""``barsmith run``: the live service, the same engine as replay on a Kafka source.

:class:`ServiceRunner` extends the replay :class:`~barsmith.runner.Runner` with the
daemon's housekeeping (one tick, every ``housekeeping_interval_s``):

* the idle rule: a partition that received nothing for ``idle_close_s`` of wall time
  closes the time bars whose end is at least that far behind the wall clock;
* exactly-once delivery (the default): per-partition checkpoints, each one
  transaction with the partition's bars and offset (see
  :mod:`barsmith.service.exactly_once`); at-least-once: offset commits every
  ``commit_interval_s``, always after the sinks have flushed what the committed
  records produced;
* drain mode (``exit_when_idle_s``): exit once no record arrived for that long.

Shutdown runs in a fixed order under ``shutdown_timeout_s``: stop fetching → then,
exactly-once, a final checkpoint per partition (open bars stay open in it, to be
continued by the next run; drain mode first closes them, marked incomplete, as
replay does at the end of its input); at-least-once, close open bars (marked
incomplete) → flush sinks → commit → close connections. A second signal skips the
flush. Rebalance callbacks run in the consumer's task, so engine work and
checkpoints hold one lock.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Sequence
from typing import cast

from barsmith.bars.bar import Bar
from barsmith.engine import Engine, EngineStats
from barsmith.errors import SinkError
from barsmith.runner import Runner, RunSummary
from barsmith.service.exactly_once import ExactlyOnce, is_bus_failure
from barsmith.service.http import HealthServer
from barsmith.service.metrics import PartitionView, ServiceMetrics
from barsmith.settings import Delivery, Settings
from barsmith.sinks.base import BarSink, CheckpointedSink, RejectSink
from barsmith.sinks.kafka import KafkaBarSink
from barsmith.sources.base import RecordBatch
from barsmith.sources.kafka import KafkaSource

log = logging.getLogger("barsmith.service")


class _CountingSink:
    """Wraps a sink to count bars, errors and latency in the service's metrics."""

    def __init__(self, inner: BarSink, metrics: ServiceMetrics) -> None:
        self.inner = inner
        self.name = inner.name
        self._metrics = metrics

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        try:
            await self.inner.publish(stream, bars)
        except SinkError:
            self._metrics.sink_errors.labels(sink=self.name).inc()
            raise
        self._metrics.count_bars(self.name, bars)

    async def flush(self) -> None:
        try:
            await self.inner.flush()
        except SinkError:
            self._metrics.sink_errors.labels(sink=self.name).inc()
            raise

    async def close(self) -> None:
        await self.inner.close()


class ServiceRunner(Runner):
    """The daemon: a :class:`Runner` over a :class:`KafkaSource` with housekeeping."""

    def __init__(
        self,
        settings: Settings,
        source: KafkaSource,
        sinks: Sequence[BarSink],
        reject_sink: RejectSink,
    ) -> None:
        self.settings = settings
        self.kafka_source = source
        self._retired = EngineStats()  # counters of engines whose partitions were revoked
        self._baselines: dict[str, EngineStats] = {}  # restored counters, per stream
        self.metrics = ServiceMetrics(
            PartitionView(self.total_stats, lambda: self.engines, self._lags),
        )
        for sink in sinks:
            if isinstance(sink, KafkaBarSink):
                sink.on_published = self._observe_publish
        counted: list[_CountingSink] = [_CountingSink(sink, self.metrics) for sink in sinks]
        super().__init__(
            settings.bar_specs(),
            settings.lateness_ns,
            source,
            counted,
            reject_sink,
            housekeeping_interval_s=settings.service.housekeeping_interval_s,
        )
        source.on_revoked = self._on_revoked
        source.on_assigned = self._on_assigned
        self.counted_sinks = counted
        self.exactly_once: ExactlyOnce | None = None
        if settings.service.delivery is Delivery.EXACTLY_ONCE:
            # Bars reach the sinks through the counting wrappers (deliver); the checkpoint
            # protocol talks to the sinks themselves.
            self.exactly_once = ExactlyOnce(self, [cast(CheckpointedSink, sink) for sink in sinks])
            source.pause_on_assign = True
            for sink in sinks:
                if isinstance(sink, KafkaBarSink):
                    sink.producer_for = self.exactly_once.producer_for
        # Engine work, checkpoints and rebalance callbacks (run by the consumer's own
        # task) take turns: a partition is never revoked halfway through a batch.
        self._lock = asyncio.Lock()
        self._draining = False
        self._http: HealthServer | None = None
        self._last_commit = time.monotonic()
        self._last_input = time.monotonic()
        self._records_seen = 0

    # -- lifecycle -------------------------------------------------------------------

    @property
    def metrics_port(self) -> int | None:
        return self._http.port if self._http is not None else None

    def ready(self) -> bool:
        """``/readyz``: the consumer runs and holds at least one partition (exactly-once:
        one restored from its checkpoint and being consumed)."""
        if not (self.kafka_source.started.is_set() and self.kafka_source.assigned) or self.should_exit:
            return False
        eos = self.exactly_once
        return eos is None or any(owner.healthy for owner in eos.owners.values())

    async def startup(self) -> None:
        await super().startup()
        port = self.settings.metrics.port
        if port is not None:
            self._http = HealthServer(self.metrics.registry, self.ready, self.settings.metrics.host, port)
            await self._http.start()
        for sink in self.counted_sinks:
            if isinstance(sink.inner, KafkaBarSink):
                from barsmith.tools.bus import ensure_topic

                await ensure_topic(self.settings.kafka, sink.inner.topic, self.settings.kafka.output_partitions)
                await sink.inner.start()
        if self.exactly_once is not None:
            await self.exactly_once.start()
        await self.kafka_source.start()
        log.info(
            "consuming %s as group %s; bars %s; delivery %s",
            ", ".join(self.settings.kafka.input_topics),
            self.settings.kafka.group_id,
            ", ".join(self.settings.bars),
            self.settings.service.delivery.value,
        )

    async def process_batch(self, batch: RecordBatch) -> None:
        async with self._lock:
            # Checked under the lock: while this batch waited for it, a rebalance
            # callback may have checkpointed, revoked or rewound its partition.
            state = self.kafka_source.current(batch)
            if state is None:
                return  # stale: the partition was reassigned or sought since the fetch
            eos = self.exactly_once
            if eos is not None and not eos.accepts(batch.stream):
                return  # revoked, fenced or recovering: the restore seeks back to this input
            await super().process_batch(batch)
            state.next_offset = batch.end_position
            if eos is not None:
                await eos.after_batch(batch.stream)
        self._last_input = time.monotonic()

    async def deliver(self, stream: str, engine: Engine) -> None:
        eos = self.exactly_once
        if eos is None:
            await super().deliver(stream, engine)
            return
        try:
            await super().deliver(stream, engine)
        except SinkError as exc:
            if not is_bus_failure(exc):
                raise
            await eos.fail(stream, exc)
        else:
            owner = eos.owners.get(stream)
            if owner is not None:
                owner.dirty = True

    def engine_for(self, stream: str) -> Engine:
        if self.exactly_once is not None:
            return self.engines[stream]  # installed by the restore on assignment
        return super().engine_for(stream)

    async def housekeeping(self, now: float) -> None:
        service = self.settings.service
        async with self._lock:
            await self._apply_idle_rule(now)
            if self.exactly_once is not None:
                await self.exactly_once.housekeeping(now)
            elif now - self._last_commit >= self.settings.kafka.commit_interval_s:
                await self._flush_and_commit()
        drain = service.exit_when_idle_s
        if drain is not None and now - self._last_input >= drain and not self.should_exit:
            log.info("no input for %.1f s: draining and exiting", drain)
            self.should_exit = True
            self._draining = True
            self.source.stop()

    async def shutdown(self) -> RunSummary:
        timeout = self.settings.service.shutdown_timeout_s
        started = time.monotonic()
        try:
            summary = await asyncio.wait_for(self._shutdown_in_order(), timeout=timeout)
        except TimeoutError:
            log.error("shutdown did not finish within %.1f s; exiting without a final commit", timeout)
            summary = RunSummary(self.total_stats(), time.perf_counter() - self._started, True)
        finally:
            if self._http is not None:
                await self._http.close()
        log.info("stopped in %.2f s", time.monotonic() - started)
        return summary

    async def _shutdown_in_order(self) -> RunSummary:
        summary = await super().shutdown()
        summary.interrupted = False  # a signalled service stops cleanly; replay reports 130
        return summary

    async def final_flush(self) -> None:
        eos = self.exactly_once
        if eos is None:
            await super().final_flush()
            return
        async with self._lock:
            if self._draining:  # end of input, as replay: close what is open
                for stream, engine in self.engines.items():
                    if eos.accepts(stream):
                        engine.finish()
            await eos.checkpoint_all(final=True)
            await eos.close()

    async def abort(self) -> None:
        if self.exactly_once is not None:
            await self.exactly_once.close()
        await super().abort()
        if self._http is not None:
            await self._http.close()

    async def after_flush(self) -> None:
        await self.kafka_source.commit()
        self.metrics.commits.inc()

    # -- housekeeping jobs -------------------------------------------------------------

    async def _apply_idle_rule(self, now: float) -> None:
        idle_s = self.settings.service.idle_close_s
        wall_ns = time.time_ns()
        limit_ns = wall_ns - int(idle_s * 1e9)
        for name, state in self.kafka_source.partitions.items():
            if now - state.last_record_wall >= idle_s:
                engine = self.engines.get(name)
                if engine is not None and (self.exactly_once is None or self.exactly_once.accepts(name)):
                    engine.close_through(limit_ns)
                    await self.deliver(name, engine)

    async def _flush_and_commit(self, streams: list[str] | None = None) -> None:
        for sink in self.sinks:
            await sink.flush()
        committed = await self.kafka_source.commit(streams)
        if committed:
            self.metrics.commits.inc()
        self._last_commit = time.monotonic()

    async def _on_revoked(self, streams: list[str]) -> None:
        """Before partitions leave. Exactly-once: a final checkpoint each, from which the
        next owner continues, open bars included. At-least-once: publish what is final,
        flush, commit, drop their state (open bars are lost to the next owner)."""
        # A rebalance is activity for drain mode: draining now would end the input while
        # the partitions just let go (open bars included) are still on their way back.
        self._last_input = time.monotonic()
        async with self._lock:
            if self.exactly_once is not None:
                await self.exactly_once.revoke(streams)
                for name in streams:
                    self.retire(name)
                return
            for name in streams:
                engine = self.engines.get(name)
                if engine is not None:
                    await self.deliver(name, engine)
            await self._flush_and_commit(streams)
            for name in streams:
                if self.retire(name):
                    log.warning("partition %s revoked; its open bars were dropped", name)

    async def _on_assigned(self, streams: list[str]) -> None:
        # Drain mode counts idle time from the (re)assignment, not from start-up: a
        # member waiting for the group to settle has not been idle on its input.
        self._last_input = time.monotonic()
        if self.exactly_once is not None and not self.should_exit:  # leaving: take nothing on
            async with self._lock:
                try:
                    await self.exactly_once.assign(streams)
                except Exception as exc:  # e.g. an unreadable checkpoint: stop, say why
                    self.kafka_source.fail(exc)
            self._last_input = time.monotonic()

    def retire(self, stream: str) -> bool:
        """Forget ``stream``'s engine, keeping its counters in the run's totals."""
        engine = self.engines.pop(stream, None)
        baseline = self._baselines.pop(stream, None)
        if engine is not None:
            self._retired.add(_own_counts(engine, baseline))
        return engine is not None

    def set_baseline(self, stream: str, stats: EngineStats) -> None:
        """A restored engine brings the stream's counters so far: this process reports
        only what it adds to them."""
        self._baselines[stream] = stats.copy()

    def _observe_publish(self, bar: Bar, delay_s: float) -> None:
        self.metrics.publish_delay.observe(delay_s)
        self.metrics.event_to_publish.observe(max(0.0, time.time() - bar.end / 1e9))

    def _lags(self) -> dict[str, tuple[str, int, int | None]]:
        return {name: (s.topic, s.partition, s.lag) for name, s in self.kafka_source.partitions.items()}

    def total_stats(self) -> EngineStats:
        total = EngineStats()
        for stream, engine in self.engines.items():
            total.add(_own_counts(engine, self._baselines.get(stream)))
        total.add(self._retired)
        return total


def _own_counts(engine: Engine, baseline: EngineStats | None) -> EngineStats:
    """What this process counted on ``engine``: without the counters a restore brought."""
    return engine.stats.since(baseline) if baseline is not None else engine.stats
