"""Delivery strategies: what the service promises about its output, as one small protocol.

The :class:`~barsmith.service.daemon.ServiceRunner` owns the loop, the lock and the
idle rule; what happens to a partition's bars and offsets is the strategy's:

=================  ==========================================================================
``start``          before consuming (exactly-once: the state topic)
``accepts``        whether a batch of the stream may be processed now
``deliver``        hand an engine's finished bars and rejects to the sinks (and handle a failure)
``after_batch``    a batch of the stream was processed (exactly-once: checkpoint when due)
``housekeeping``   the periodic tick (commits, checkpoints, recovery)
``assign``         partitions given to this process (rebalance callback)
``revoke``         partitions about to be taken away (rebalance callback)
``final_flush``    the clean stop (``draining``: input ended, close open bars as replay does)
``close``          after a failure: let go of connections without flushing
=================  ==========================================================================

A strategy sees a :class:`DeliveryContext`, not the runner: the held partitions
(states and engines), the source's positions, the hand-over to the sinks, the sinks'
flush, and the metrics. Two strategies: :class:`AtLeastOnce` here, and
:class:`~barsmith.service.exactly_once.ExactlyOnce`.

The runner calls all but ``start`` and ``close`` with its lock held, so engines and
positions change only inside these calls. A strategy may run its own work in tasks
beside the loop — a transaction's round trip while the next batches are processed,
say — as long as what touches engines and positions happens inside the calls, and
what it does to a sink beside the loop (``committed`` after a commit) concerns a stream
that nothing hands bars to meanwhile.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass
from typing import Protocol

from barsmith.engine import Engine
from barsmith.service.metrics import ServiceMetrics
from barsmith.service.partitions import Partitions, PartitionState
from barsmith.settings import Settings
from barsmith.sources.base import SourcePositions

log = logging.getLogger("barsmith.service")


@dataclass(frozen=True, slots=True)
class DeliveryContext:
    """What a delivery strategy may touch."""

    partitions: Partitions  # held partitions: states, engines, counters
    positions: SourcePositions  # where each partition stands; seek, pause, resume, commit
    hand_over: Callable[[str, Engine], Awaitable[None]]  # an engine's finished bars and rejects → the sinks
    flush: Callable[[], Awaitable[None]]  # make everything handed over durable (every sink)
    metrics: ServiceMetrics


class DeliveryStrategy(Protocol):
    """The protocol of the table in the module doc."""

    async def start(self) -> None: ...

    def accepts(self, stream: str) -> bool: ...

    async def deliver(self, stream: str, engine: Engine) -> None: ...

    async def after_batch(self, stream: str) -> None: ...

    async def housekeeping(self, now: float) -> None: ...

    async def assign(self, streams: Sequence[str]) -> None: ...

    async def revoke(self, streams: Sequence[str]) -> None: ...

    async def final_flush(self, draining: bool) -> None: ...

    async def close(self) -> None: ...


DeliveryFactory = Callable[[DeliveryContext], DeliveryStrategy]
"""Builds the strategy once the runner can give it its context (see ``build_service``)."""


class AtLeastOnce:
    """Offsets committed every ``commit_interval_s`` and at the end, always *after* the
    sinks have flushed the bars those records produced: a bar already published is
    never lost, but after a crash the bars since the last commit are published again,
    and a revoked partition's open bars are dropped (logged)."""

    def __init__(self, settings: Settings, context: DeliveryContext) -> None:
        self._commit_interval_s = settings.kafka.commit_interval_s
        self._context = context
        self._last_commit = time.monotonic()

    async def start(self) -> None:
        return None

    def accepts(self, stream: str) -> bool:
        return True  # every batch the source still vouches for

    async def deliver(self, stream: str, engine: Engine) -> None:
        await self._context.hand_over(stream, engine)  # a failure stops the service

    async def after_batch(self, stream: str) -> None:
        return None

    async def housekeeping(self, now: float) -> None:
        if now - self._last_commit >= self._commit_interval_s:
            await self._flush_and_commit()

    async def assign(self, streams: Sequence[str]) -> None:
        partitions = self._context.partitions
        for stream in streams:
            if partitions.state(stream) is None:
                partitions.hold(stream, PartitionState.LIVE)

    async def revoke(self, streams: Sequence[str]) -> None:
        """Publish what is final, flush, commit, drop their state: open bars are lost to
        the next owner."""
        context = self._context
        for stream in streams:
            engine = context.partitions.engines.get(stream)
            if engine is not None:
                await context.hand_over(stream, engine)
        await self._flush_and_commit(list(streams))
        for stream in streams:
            if context.partitions.release(stream):
                log.warning("partition %s revoked; its open bars were dropped", stream)

    async def final_flush(self, draining: bool) -> None:
        """Close open bars (marked incomplete), hand them over, flush, commit."""
        context = self._context
        for stream, engine in context.partitions.engines.items():
            engine.finish()
            await context.hand_over(stream, engine)
        await context.flush()
        await context.positions.commit()
        context.metrics.commits.inc()

    async def close(self) -> None:
        return None

    async def _flush_and_commit(self, streams: list[str] | None = None) -> None:
        await self._context.flush()
        committed = await self._context.positions.commit(streams)
        if committed:
            self._context.metrics.commits.inc()
        self._last_commit = time.monotonic()
