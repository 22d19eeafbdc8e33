"""Assembling the service from settings (all its wiring, in one place), logging, and
supervising ``--workers N`` processes."""

from __future__ import annotations

import functools
import json
import logging
import os
import signal
import socket
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Callable, Sequence
from typing import Any

from barsmith.bars.record import Bar
from barsmith.bus.checkpoints import KafkaCheckpointBus
from barsmith.errors import ConfigError
from barsmith.ingest.rejects import Reject
from barsmith.runner import RunSummary
from barsmith.service.daemon import ServiceRunner, service_metrics
from barsmith.service.delivery import AtLeastOnce, DeliveryFactory
from barsmith.service.exactly_once import ExactlyOnce
from barsmith.service.partitions import Partitions
from barsmith.settings import Delivery, Settings
from barsmith.sinks.base import BarSink, CheckpointedSink, RejectSink
from barsmith.sinks.kafka import KafkaBarSink
from barsmith.sinks.parquet import ParquetBarSink, ParquetPartSink, ParquetRejectSink
from barsmith.sources.kafka import KafkaSource

log = logging.getLogger("barsmith.service")


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return json.dumps(
            {
                "ts": self.formatTime(record, "%Y-%m-%dT%H:%M:%S"),
                "level": record.levelname.lower(),
                "logger": record.name,
                "msg": record.getMessage(),
            }
        )


class _RepeatFilter(logging.Filter):
    """The Kafka client logs the same error many times a second while a broker is away;
    let one line per message pattern through every ``window_s`` and count the rest."""

    def __init__(self, window_s: float = 10.0) -> None:
        super().__init__()
        self._window_s = window_s
        self._last: dict[tuple[str, str], tuple[float, int]] = {}

    def filter(self, record: logging.LogRecord) -> bool:
        if not record.name.startswith("aiokafka"):
            return True
        key = (record.name, str(record.msg))
        now = time.monotonic()
        last, suppressed = self._last.get(key, (-self._window_s, 0))
        if now - last < self._window_s:
            self._last[key] = (last, suppressed + 1)
            return False
        self._last[key] = (now, 0)
        if suppressed:
            record.msg = f"{record.msg} ({suppressed} similar lines in the last {self._window_s:.0f} s suppressed)"
        return True


def configure_logging(as_json: bool) -> None:
    """One line per notable event on stderr (never one per tick)."""
    handler = logging.StreamHandler(sys.stderr)
    if as_json:
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    handler.addFilter(_RepeatFilter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(logging.INFO)
    logging.getLogger("aiokafka").setLevel(logging.WARNING)


class LogRejectSink:
    """When no rejects directory is set: count rejects and log a summary per batch."""

    def __init__(self) -> None:
        self.counts: Counter[str] = Counter()

    async def write(self, rejects: Sequence[Reject]) -> None:
        batch = Counter(r.reason.value for r in rejects)
        self.counts.update(batch)
        first = rejects[0]
        log.warning(
            "%d rejected record(s) (%s); first at %s offset %d: %s",
            len(rejects),
            ", ".join(f"{k} {v}" for k, v in sorted(batch.items())),
            first.source,
            first.position,
            first.detail,
        )

    async def close(self) -> None:
        return None


PublishObserver = Callable[[Bar, float], None]
_Parts = tuple[list[BarSink], RejectSink, DeliveryFactory]


def build_service(settings: Settings, *, on_published: PublishObserver | None = None) -> ServiceRunner:
    """The service for ``settings``, wired here and nowhere else: a Kafka source, the
    configured sinks with their callbacks, the delivery strategy, the metrics.
    ``on_published(bar, delay_s)`` also hears of every bar the broker acknowledged."""
    if not settings.kafka.output_topic and settings.parquet.dir is None:
        raise ConfigError("no sink: give --output-topic and/or --parquet-dir")
    exactly_once = settings.service.delivery is Delivery.EXACTLY_ONCE
    source = KafkaSource(
        settings.kafka, pause_on_assign=exactly_once, max_record_bytes=settings.limits.max_record_bytes
    )
    partitions = Partitions()
    metrics = service_metrics(partitions, source)
    observe: PublishObserver = metrics.observe_publish
    if on_published is not None:
        observe = functools.partial(_tell_both, metrics.observe_publish, on_published)
    sinks, reject_sink, delivery = (_exactly_once if exactly_once else _at_least_once)(settings, observe)
    return ServiceRunner(settings, source, sinks, reject_sink, delivery, partitions=partitions, metrics=metrics)


def _tell_both(first: PublishObserver, second: PublishObserver, bar: Bar, delay_s: float) -> None:
    first(bar, delay_s)
    second(bar, delay_s)


def _exactly_once(settings: Settings, observe: PublishObserver) -> _Parts:
    """Per-partition transactions: the bus sink sends each partition's bars in its
    transaction; Parquet parts (and rejects beside them) commit with its checkpoints."""
    bus = KafkaCheckpointBus(settings)
    sinks: list[CheckpointedSink] = []
    reject_sink: RejectSink = LogRejectSink()
    if settings.kafka.output_topic:
        topic = settings.kafka.output_topic
        sinks.append(
            KafkaBarSink(
                settings.kafka,
                topic,
                on_published=observe,
                producer_for=bus.producer_for,
                final_only=settings.kafka.output_mode == "final",
            )
        )
    pq = settings.parquet
    if pq.dir is not None:
        pq.dir.mkdir(parents=True, exist_ok=True)
        part_sink = ParquetPartSink(
            pq.dir,
            settings.bar_specs(),
            roll_interval_s=pq.roll_interval_s if pq.roll_interval_s is not None else 300.0,
            carry_max_rows=pq.row_group_rows,
            compression=pq.compression,
            final_only=pq.output_mode == "final",
        )
        sinks.append(part_sink)
        reject_sink = part_sink
    return list(sinks), reject_sink, functools.partial(ExactlyOnce, settings, sinks, bus)


def _at_least_once(settings: Settings, observe: PublishObserver) -> _Parts:
    """One idempotent bar producer; rolling Parquet files named after this process."""
    sinks: list[BarSink] = []
    reject_sink: RejectSink = LogRejectSink()
    if settings.kafka.output_topic:
        sinks.append(
            KafkaBarSink(
                settings.kafka,
                settings.kafka.output_topic,
                on_published=observe,
                final_only=settings.kafka.output_mode == "final",
            )
        )
    pq = settings.parquet
    if pq.dir is not None:
        pq.dir.mkdir(parents=True, exist_ok=True)
        prefix = f"{settings.kafka.client_id}-{socket.gethostname()}-{os.getpid()}-{time.time_ns() // 1_000_000}-"
        sinks.append(
            ParquetBarSink(
                pq.dir,
                settings.bar_specs(),
                row_group_rows=pq.row_group_rows,
                max_file_rows=pq.max_file_rows,
                roll_interval_s=pq.roll_interval_s if pq.roll_interval_s is not None else 300.0,
                compression=pq.compression,
                file_prefix=prefix,
                final_only=pq.output_mode == "final",
            )
        )
        reject_sink = ParquetRejectSink(pq.dir, f"_rejects-{prefix.rstrip('-')}.parquet")
    return sinks, reject_sink, functools.partial(AtLeastOnce, settings)


def run_service(settings: Settings) -> RunSummary:
    """Run one service process until drained or signalled."""
    runner = build_service(settings)

    def force_exit() -> None:
        log.warning("second signal: exiting now without flushing")
        os._exit(130)

    runner.on_force_exit = force_exit
    return runner.run()


def run_workers(commands: Sequence[Sequence[str]]) -> int:
    """Run one worker process per command (the CLI builds them: same group, one
    metrics port each) and wait for all; signals are forwarded to every child.
    Returns the worst exit status."""
    children: list[subprocess.Popen[bytes]] = []
    for index, command in enumerate(commands):
        env = dict(os.environ, BARSMITH_WORKER_INDEX=str(index))
        children.append(subprocess.Popen(list(command), env=env))
    log.info("started %d workers: pids %s", len(children), ", ".join(str(c.pid) for c in children))

    def forward(signum: int, _frame: Any) -> None:
        for child in children:
            if child.poll() is None:
                child.send_signal(signum)

    signal.signal(signal.SIGTERM, forward)
    signal.signal(signal.SIGINT, forward)
    codes = [child.wait() for child in children]
    return max(codes) if any(codes) else 0
