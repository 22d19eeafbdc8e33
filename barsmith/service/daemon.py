"""``barsmith run``: the live service, the same engine as replay on a live source.

:class:`ServiceRunner` extends the replay :class:`~barsmith.runner.Runner` with the
daemon's housekeeping (one tick, every ``housekeeping_interval_s``):

* the idle rule: a partition that received nothing for ``idle_close_s`` of wall time
  closes the time bars whose end is at least that far behind the wall clock;
* the delivery strategy's periodic work (:mod:`barsmith.service.delivery`):
  exactly-once checkpoints, each one transaction with the partition's bars and offset
  (:mod:`barsmith.service.exactly_once`), or at-least-once offset commits every
  ``commit_interval_s``, always after the sinks have flushed what the committed
  records produced;
* drain mode (``exit_when_idle_s``): exit once no record arrived for that long.

What happens to bars and offsets is the strategy's; the runner owns the loop, the
lock, the idle rule, drain mode and the order of shutdown. Shutdown runs under
``shutdown_timeout_s``: stop fetching → the strategy's final flush (exactly-once: a
final checkpoint per partition, open bars kept open in it for the next run — drain
mode first closes them, marked incomplete, as replay does at the end of its input;
at-least-once: close open bars, flush sinks, commit) → close connections. A second
signal skips the flush. Rebalance callbacks run in the consumer's task, so engine
work, checkpoints and the callbacks hold one lock.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Sequence

from barsmith.bars.record import Bar
from barsmith.engine import Engine, EngineStats
from barsmith.errors import SinkError
from barsmith.runner import Runner, RunSummary
from barsmith.service.delivery import DeliveryContext, DeliveryFactory
from barsmith.service.http import HealthServer
from barsmith.service.metrics import PartitionView, ServiceMetrics
from barsmith.service.partitions import Partitions, PartitionState
from barsmith.settings import Settings
from barsmith.sinks.base import BarSink, RejectSink
from barsmith.sources.base import LiveSource, RecordBatch

log = logging.getLogger("barsmith.service")


def service_metrics(partitions: Partitions, source: LiveSource) -> ServiceMetrics:
    """The service's metrics, reading the held partitions and the source at scrape time."""
    return ServiceMetrics(
        PartitionView(
            partitions.total_stats,
            lambda: partitions.engines,
            lambda: {name: position.lag for name, position in source.partitions.items()},
            partitions.by_state,
            lambda: source.key_mismatches,
        )
    )


class _CountingSink:
    """Wraps a sink to count bars, errors and latency in the service's metrics."""

    def __init__(self, inner: BarSink, metrics: ServiceMetrics) -> None:
        self.inner = inner
        self.name = inner.name
        self.final_only = inner.final_only
        self._metrics = metrics

    async def start(self) -> None:
        await self.inner.start()

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
    """The daemon: a :class:`Runner` over a :class:`~barsmith.sources.base.LiveSource`
    with housekeeping; ``delivery`` builds the delivery strategy from its context.

    ``partitions`` and ``metrics`` may be given when something built before the runner
    needs them (the bus sink reports acknowledgements to the metrics)."""

    def __init__(
        self,
        settings: Settings,
        source: LiveSource,
        sinks: Sequence[BarSink],
        reject_sink: RejectSink,
        delivery: DeliveryFactory,
        *,
        partitions: Partitions | None = None,
        metrics: ServiceMetrics | None = None,
    ) -> None:
        self.settings = settings
        self.live_source = source
        self.partitions = partitions if partitions is not None else Partitions()
        self.metrics = metrics if metrics is not None else service_metrics(self.partitions, source)
        super().__init__(
            settings.bar_specs(),
            settings.lateness_ns,
            source,
            [_CountingSink(sink, self.metrics) for sink in sinks],
            reject_sink,
            housekeeping_interval_s=settings.service.housekeeping_interval_s,
            limits=settings.stream_limits(),
            engines=self.partitions.engines,
            revision_window_ns=settings.revision_window_ns,
        )
        self.delivery = delivery(
            DeliveryContext(self.partitions, source, self._hand_over, self._flush_sinks, self.metrics)
        )
        # Engine work, checkpoints and rebalance callbacks (run by the consumer's own
        # task) take turns: a partition is never revoked halfway through a batch.
        self._lock = asyncio.Lock()
        self._draining = False
        self._http: HealthServer | None = None
        self._last_input = time.monotonic()

    # -- lifecycle -------------------------------------------------------------------

    @property
    def metrics_port(self) -> int | None:
        return self._http.port if self._http is not None else None

    def ready(self) -> bool:
        """``/readyz``: the consumer runs and at least one partition is live (exactly-once:
        restored from its checkpoint and being consumed)."""
        live = self.partitions.by_state()[PartitionState.LIVE]
        return self.live_source.started.is_set() and live > 0 and not self.should_exit

    async def startup(self) -> None:
        port = self.settings.metrics.port
        if port is not None:
            self._http = HealthServer(self.metrics.registry, self.ready, self.settings.metrics.host, port)
            await self._http.start()
        await super().startup()  # starts the sinks
        await self.delivery.start()
        await self.live_source.start(self)
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
            position = self.live_source.current(batch)
            if position is None:
                return  # stale: the partition was reassigned or sought since the fetch
            if not self.delivery.accepts(batch.stream):
                return  # revoked, fenced or recovering: the restore seeks back to this input
            # Live data: the wall clock bounds how far ahead a tick may be (README, "Event time").
            self.engine_for(batch.stream).set_wall_clock(time.time_ns())
            await super().process_batch(batch)
            # A failed delivery may have rewound the partition meanwhile: then the seek
            # says where it continues, not this batch.
            if self.live_source.current(batch) is position:
                position.next_offset = batch.end_position
                await self.delivery.after_batch(batch.stream)
        self._last_input = time.monotonic()

    async def deliver(self, stream: str, engine: Engine) -> None:
        await self.delivery.deliver(stream, engine)

    async def _hand_over(self, stream: str, engine: Engine) -> None:
        await super().deliver(stream, engine)

    async def _flush_sinks(self) -> None:
        for sink in self.sinks:
            await sink.flush()

    async def housekeeping(self, now: float) -> None:
        async with self._lock:
            await self._apply_idle_rule(now)
            await self.delivery.housekeeping(now)
        drain = self.settings.service.exit_when_idle_s
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
        async with self._lock:
            await self.delivery.final_flush(self._draining)

    async def abort(self) -> None:
        await self.delivery.close()
        await super().abort()
        if self._http is not None:
            await self._http.close()

    # -- rebalance callbacks (the source's listener) ----------------------------------

    async def on_assigned(self, streams: list[str]) -> None:
        # Drain mode counts idle time from the (re)assignment, not from start-up: a
        # member waiting for the group to settle has not been idle on its input.
        self._last_input = time.monotonic()
        if self.should_exit:
            return  # leaving: take nothing on
        async with self._lock:
            try:
                await self.delivery.assign(streams)
            except Exception as exc:  # e.g. an unreadable checkpoint: stop, say why
                self.live_source.fail(exc)
        self._last_input = time.monotonic()

    async def on_revoked(self, streams: list[str]) -> None:
        """Before partitions leave: the strategy checkpoints or commits what they did."""
        # A rebalance is activity for drain mode: draining now would end the input while
        # the partitions just let go (open bars included) are still on their way back.
        self._last_input = time.monotonic()
        async with self._lock:
            await self.delivery.revoke(streams)

    # -- housekeeping jobs -------------------------------------------------------------

    async def _apply_idle_rule(self, now: float) -> None:
        idle_s = self.settings.service.idle_close_s
        wall_ns = time.time_ns()
        limit_ns = wall_ns - int(idle_s * 1e9)
        for name, position in list(self.live_source.partitions.items()):
            if now - position.last_record_wall >= idle_s:
                engine = self.engines.get(name)
                if engine is not None and self.delivery.accepts(name):
                    engine.close_through(limit_ns)
                    await self.deliver(name, engine)

    def total_stats(self) -> EngineStats:
        return self.partitions.total_stats()
