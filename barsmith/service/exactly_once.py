"""Exactly-once delivery: per input partition, bars, checkpoint and offsets in one transaction.

Every assigned input partition has an *owner* here: its transaction on the
:class:`~barsmith.bus.checkpoints.CheckpointBus` (opening it fences any earlier
owner of the partition and aborts that owner's open transaction) and its last
committed checkpoint; its :class:`~barsmith.service.partitions.PartitionState` is
kept with the other held partitions. A checkpoint, per partition, every
``checkpoint.interval_s`` or ``checkpoint.every_messages`` (and on revocation and
shutdown), is one transaction:

    bars since the last checkpoint (already sent inside the open transaction)
    + the engine's checkpoint → the state store (on Kafka: a compacted topic)
    + the next input offset → the consumer group
    → commit; then the checkpointed sinks publish what they staged (Parquet parts).

The commit's round trips (offsets, then the commit itself: tens of milliseconds on a
real broker) overlap with processing: the checkpoint is taken and its bars sent under
the runner's lock, then the commit runs as a task of its own while the partition's
next batches are processed. Their bars wait in the engine until the commit is done and
the next transaction has begun (a producer has one transaction at a time), and no
second checkpoint of the partition starts meanwhile; a final checkpoint (revocation,
shutdown) waits for the one in flight. A commit that fails in flight is handled at the
partition's next call, under the lock, as any failed transaction: the partition
rewinds to its last *committed* checkpoint, which the failed one never replaced, so
the input processed meanwhile is read again.

On assignment (``restoring``) the owner reads the partition's latest checkpoint,
restores the engine and the sinks' staged state, and seeks the source to the
checkpoint's offset (``live``). When a transaction fails (broker gone, timeout), the
partition is ``failed``: the owner aborts the transaction and *rewinds* — restores
the last committed checkpoint, as stored (read once the abort or a new producer has
settled the failed transaction: a commit may have landed although the client saw it
time out), and seeks back, so the bars of the aborted transaction are built again
from the same input. A ``fenced`` owner (another producer took the
partition's transactional id) stops touching the partition and waits for the
revocation; if the group still assigns the partition to this process two session
timeouts later (the fencer was a zombie, or the broker aborted a transaction that
outlived ``transaction_timeout_ms``), it takes the partition back from its checkpoint.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import AsyncIterator, Iterator, Sequence
from typing import Any

from barsmith.bus.checkpoints import CheckpointBus, PartitionTransaction
from barsmith.bus.clients import is_bus_failure, is_fenced
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.errors import StateError, describe_error
from barsmith.service.delivery import DeliveryContext
from barsmith.service.partitions import PartitionState
from barsmith.settings import Settings
from barsmith.sinks.base import CheckpointedSink

log = logging.getLogger("barsmith.checkpoint")

RESTORING, LIVE, FAILED, FENCED = (
    PartitionState.RESTORING,
    PartitionState.LIVE,
    PartitionState.FAILED,
    PartitionState.FENCED,
)


class PartitionOwner:
    """This process's hold on one input partition: its transaction and last checkpoint."""

    __slots__ = (
        "checkpoint",
        "dirty",
        "epoch",
        "failure",
        "fenced_at",
        "inflight",
        "last_at",
        "offset",
        "partition",
        "records_at",
        "restores",
        "sink_states",
        "stream",
        "topic",
        "transaction",
    )

    def __init__(self, stream: str, topic: str, partition: int) -> None:
        self.stream = stream
        self.topic = topic
        self.partition = partition
        self.transaction: PartitionTransaction | None = None  # None: to be opened
        self.checkpoint: bytes | None = None  # the last committed checkpoint
        self.offset: int | None = None  # its input offset (None: the partition's beginning)
        self.sink_states: dict[str, Any] = {}
        self.epoch = 0
        self.last_at = time.monotonic()
        self.records_at = 0
        self.dirty = False  # something went into the open transaction since the checkpoint
        self.fenced_at = 0.0
        self.restores = 0  # how often state was (re)installed: a checkpoint in flight is then void
        self.inflight: asyncio.Task[None] | None = None  # the commit in flight, if any
        self.failure: BaseException | None = None  # how the commit in flight failed, to be handled

    @property
    def open_transaction(self) -> PartitionTransaction:
        if self.transaction is None:
            raise StateError(f"partition {self.stream} has no open transaction")
        return self.transaction


class ExactlyOnce:
    """The exactly-once :class:`~barsmith.service.delivery.DeliveryStrategy` (see module doc).

    ``sinks`` are the checkpointed sinks themselves (the checkpoint protocol talks to
    them); bars reach them through ``context.hand_over``.
    """

    def __init__(
        self, settings: Settings, sinks: Sequence[CheckpointedSink], bus: CheckpointBus, context: DeliveryContext
    ) -> None:
        self._checkpoint_settings = settings.checkpoint
        self._grace_s = 2 * settings.kafka.session_timeout_ms / 1000
        self._specs = settings.bar_specs()
        self._lateness_ns = settings.lateness_ns
        self._limits = settings.stream_limits()
        self._revision_window_ns = settings.revision_window_ns
        self._sinks = tuple(sinks)
        self._bus = bus
        self._context = context
        self._partitions = context.partitions
        self._positions = context.positions
        self._metrics = context.metrics
        self._owners: dict[str, PartitionOwner] = {}

    async def start(self) -> None:
        await self._bus.start()

    async def close(self) -> None:
        owners, self._owners = list(self._owners.values()), {}
        for owner in owners:
            if owner.inflight is not None:
                owner.inflight.cancel()  # a commit cut short is one the broker aborts
        await asyncio.gather(*(self._await_inflight(owner) for owner in owners))
        await asyncio.gather(*(self._drop_transaction(owner) for owner in owners))
        await self._bus.close()

    def accepts(self, stream: str) -> bool:
        """Input of ``stream`` may be processed only while it is live (and its commit in
        flight has not failed: the rewind reads that input again)."""
        if not self._partitions.is_live(stream):
            return False
        owner = self._owners.get(stream)
        return owner is None or owner.failure is None

    async def deliver(self, stream: str, engine: Engine) -> None:
        """Bars go out inside the partition's open transaction; a bus failure rewinds it.
        While a commit is in flight they wait in the engine for the next transaction."""
        owner = self._owner(stream)
        if owner.inflight is not None:
            owner.dirty = True
            return
        if await self._settle(owner):
            return
        async with self._rewind_on_bus_failure(owner):
            await self._context.hand_over(stream, engine)
            owner.dirty = True

    async def after_batch(self, stream: str) -> None:
        owner = self._owners.get(stream)
        if owner is None or not self._partitions.is_live(stream):
            return
        engine = self._partitions.engines[stream]
        every = self._checkpoint_settings.every_messages
        if owner.inflight is not None and engine.stats.records - owner.records_at >= 2 * every:
            # A commit that stalls (a slow broker) holds the partition back here, under the
            # lock: otherwise input and waiting bars would pile up behind it without bound.
            await self._await_inflight(owner)
        if await self._settle(owner):
            return
        owner.dirty = True
        if engine.stats.records - owner.records_at >= every:
            await self.checkpoint(stream)

    # -- assignment and revocation ----------------------------------------------------

    async def assign(self, streams: Sequence[str]) -> None:
        """Take over ``streams``: fence earlier owners, restore checkpoints, seek."""
        new = [s for s in streams if s not in self._owners]
        for stream in new:
            position = self._positions.partitions[stream]
            self._owners[stream] = PartitionOwner(stream, position.topic, position.partition)
            self._partitions.hold(stream, RESTORING)
        await self._recover([self._owners[s] for s in new])

    async def revoke(self, streams: Sequence[str]) -> None:
        """Let go of ``streams``: checkpoint and commit what they did, then forget them."""
        mine = [s for s in streams if s in self._owners]
        await asyncio.gather(*(self.checkpoint(s, final=True) for s in mine if self._partitions.is_live(s)))
        for stream in mine:
            for sink in self._sinks:
                sink.release(stream)
        await asyncio.gather(*(self._drop_transaction(self._owners.pop(s)) for s in mine))
        for stream in streams:
            self._partitions.release(stream)

    # -- checkpoints --------------------------------------------------------------------

    async def housekeeping(self, now: float) -> None:
        """Take fenced partitions back after the grace; recover restoring and failed ones
        (a bus failure is logged and retried next time); checkpoint those due."""
        for stream in self._partitions.in_state(FENCED):
            owner = self._owners[stream]
            if now - owner.fenced_at >= self._grace_s:
                self._partitions.move(
                    stream,
                    FAILED,
                    "still assigned here %.0f s after being fenced: taking it back",
                    self._grace_s,
                    level=logging.WARNING,
                )
                await self._drop_transaction(owner)
        for stream in self._partitions.in_state(LIVE):
            await self._settle(self._owners[stream])
        recovering = self._partitions.in_state(RESTORING, FAILED)
        if recovering:
            await self._recover([self._owners[s] for s in recovering])
        interval = self._checkpoint_settings.interval_s
        due = [
            s
            for s in self._partitions.in_state(LIVE)
            if now - self._owners[s].last_at >= interval and self._owners[s].inflight is None
        ]
        # Partitions are independent (own transaction, engine, sink buffers): their
        # transactions' round trips overlap with each other and with processing.
        await asyncio.gather(*(self.checkpoint(stream) for stream in due))

    async def final_flush(self, draining: bool) -> None:
        """A final checkpoint of every live partition (open bars stay open in it, to be
        continued by the next run; ``draining`` first closes them, marked incomplete)."""
        live = self._partitions.in_state(LIVE)
        if draining:  # end of input, as replay: close what is open
            for stream in live:
                self._partitions.engines[stream].finish()
        await asyncio.gather(*(self.checkpoint(stream, final=True) for stream in live))
        await self.close()

    async def checkpoint(self, stream: str, final: bool = False) -> bool:
        """Commit ``stream``'s bars, checkpoint and offset in one transaction: a final
        one before returning, any other in a task of its own (see the module doc).
        Returns whether it committed or set off to (False: nothing new, a commit already
        in flight, or it failed and rewound)."""
        owner = self._owner(stream)
        if owner.inflight is not None:
            if not final:
                return False
            await self._await_inflight(owner)
        # A failed commit in flight rewinds the partition: a periodic checkpoint then has
        # nothing to do; a final one goes on from the rewound state, if it is live again
        # (what the failed commit covered is read again by the next run).
        if await self._settle(owner) and not final:
            return False
        if final and not self._partitions.is_live(stream):
            return False  # fenced, or its rewind waits for the broker: the next owner continues
        if not self._partitions.is_live(stream):
            raise StateError(f"partition {stream} is {self._partitions.state(stream)}: only a live one checkpoints")
        engine = self._partitions.engines[stream]
        position = self._positions.partitions.get(stream)
        offset = position.next_offset if position is not None and position.next_offset is not None else owner.offset
        owner.last_at = time.monotonic()
        # Nothing new since the last checkpoint: skip, except on the way out, where
        # the final checkpoint also writes what the sinks still carry.
        if offset is None or (offset == owner.offset and not owner.dirty and not final):
            return False
        started = time.perf_counter()
        restores = owner.restores
        await self.deliver(stream, engine)
        if owner.restores != restores or not self._partitions.is_live(stream):
            return False  # the delivery failed: the partition rewound (or waits to)
        prepared = False
        async with self._rewind_on_bus_failure(owner):
            sink_states = {sink.name: await sink.prepare(stream, offset, final) for sink in self._sinks}
            prepared = True
        if not prepared:
            return False
        meta = {"offset": offset, "sinks": sink_states, "epoch": owner.epoch + 1, "written_ns": time.time_ns()}
        data = encode_checkpoint(engine, meta)
        records = engine.stats.records
        owner.dirty = False  # what comes now goes into the next checkpoint
        if final:
            committed = False
            async with self._rewind_on_bus_failure(owner):
                await self._commit(owner, data, offset, sink_states, records, started, final)
                committed = True
            return committed
        owner.inflight = asyncio.create_task(self._commit_in_flight(owner, data, offset, sink_states, records, started))
        return True

    async def _commit(
        self,
        owner: PartitionOwner,
        data: bytes,
        offset: int,
        sink_states: dict[str, Any],
        records: int,
        started: float,
        final: bool,
    ) -> None:
        """The transaction's commit and what follows it (a bus failure propagates)."""
        await owner.open_transaction.commit(data, offset)
        self._metrics.transactions.labels(outcome="committed").inc()
        self._metrics.checkpoint_bytes.observe(len(data))
        self._metrics.checkpoint_seconds.observe(time.perf_counter() - started)
        owner.checkpoint, owner.offset, owner.sink_states = data, offset, sink_states
        owner.epoch += 1
        owner.records_at = records
        for sink in self._sinks:
            await sink.committed(owner.stream, sink_states[sink.name])
        if not final:
            await owner.open_transaction.begin()

    async def _commit_in_flight(
        self, owner: PartitionOwner, data: bytes, offset: int, sink_states: dict[str, Any], records: int, started: float
    ) -> None:
        """:meth:`_commit` beside the loop: a failure is kept for the partition's next
        call, which handles it under the lock (engines and positions change only there)."""
        try:
            await self._commit(owner, data, offset, sink_states, records, started, False)
        except Exception as exc:  # a cancellation (close) is no failure and propagates
            owner.failure = exc
        finally:
            owner.inflight = None

    async def _await_inflight(self, owner: PartitionOwner) -> None:
        """Wait for the owner's commit in flight (if any) to end, however it ends; a
        cancellation of the caller itself still propagates."""
        task = owner.inflight
        if task is not None:
            await asyncio.wait([task])

    async def _settle(self, owner: PartitionOwner) -> bool:
        """Handle a failure of the commit that was in flight: True when there was one
        (the partition then rewinds, or stands back when fenced). Anything but a bus
        failure is a bug and propagates."""
        exc, owner.failure = owner.failure, None
        if exc is None:
            return False
        if not is_bus_failure(exc):
            raise exc
        if self._partitions.is_live(owner.stream):
            await self.fail(owner, exc)
        return True

    async def fail(self, owner: PartitionOwner, exc: BaseException) -> None:
        """The open transaction of a live partition failed: abort it and rewind to the
        checkpoint (fenced: stand back)."""
        stream = owner.stream
        fenced = is_fenced(exc)
        if fenced:
            owner.fenced_at = time.monotonic()
            self._partitions.move(
                stream,
                FENCED,
                "another producer took this partition's transactional id (fenced); standing back",
                level=logging.ERROR,
            )
        else:
            self._partitions.move(
                stream,
                FAILED,
                "transaction failed (%s); rewinding to the checkpoint at offset %s",
                describe_error(exc),
                owner.offset,
                level=logging.WARNING,
            )
        self._positions.pause(stream)  # no point fetching what the rewind re-reads
        self._metrics.transactions.labels(outcome="aborted").inc()
        if fenced:
            return  # wait for the revocation (or take it back: housekeeping)
        try:
            await owner.open_transaction.abort()
        except Exception:
            # The producer cannot abort (fatal state or no broker): replace it. Starting
            # a producer with the same transactional id aborts the transaction for us.
            await self._drop_transaction(owner)
        await self._recover([owner])  # a bus failure is logged and retried by housekeeping

    # -- recovery -----------------------------------------------------------------------

    async def _recover(self, owners: Sequence[PartitionOwner]) -> None:
        """Bring restoring and failed partitions back to live. Their transactions open
        first, in parallel: that fences the earlier owners and aborts their open
        transactions, so the stored checkpoints are stable when read (one read for all of
        them; a failed partition's transaction was aborted or its producer replaced
        before). A bus failure leaves a partition as it is, for housekeeping to retry."""
        await asyncio.gather(*(self._open_transaction(owner) for owner in owners if owner.transaction is None))
        ready = [owner for owner in owners if owner.transaction is not None]
        if not ready:
            return
        stored: dict[str, bytes] | None = None
        with self._retry_later("cannot read checkpoints"):
            stored = await self._bus.load([owner.stream for owner in ready])
        if stored is None:
            return  # the checkpoints decide where each partition goes on: no guessing
        for owner in ready:
            state = self._partitions.state(owner.stream)
            with self._retry_later(f"{owner.stream} ({state}): cannot restore"):
                if state is FAILED:
                    self._reconcile(owner, stored.get(owner.stream))
                    await self._restore(owner, "rewind")
                else:
                    group_offset = await self._adopt(owner, stored.get(owner.stream))
                    await self._restore(owner, "assignment", group_offset)

    def _reconcile(self, owner: PartitionOwner, data: bytes | None) -> None:
        """Before a rewind: the stored checkpoint, read after the failed transaction was
        aborted or its producer replaced (the broker has then finished or aborted it), is
        the last committed one. A commit that failed on the client may still have landed (a timeout
        after the broker took it); rewinding to the checkpoint before it would commit that
        stretch of bars a second time."""
        if data is not None and data != owner.checkpoint:
            log.warning(
                "%s: the commit that failed had landed (its checkpoint is stored): rewinding to it instead",
                owner.stream,
            )
            owner.checkpoint = data

    async def _open_transaction(self, owner: PartitionOwner) -> None:
        with self._retry_later(f"{owner.stream}: cannot start its producer"):
            owner.transaction = await self._bus.open(owner.stream, owner.topic, owner.partition)

    async def _drop_transaction(self, owner: PartitionOwner) -> None:
        transaction, owner.transaction = owner.transaction, None
        if transaction is not None:
            await transaction.stop()

    async def _adopt(self, owner: PartitionOwner, data: bytes | None) -> int | None:
        """Take ``data`` (the partition's stored checkpoint, if any) as the owner's last;
        returns the consumer group's committed offset of the partition."""
        committed = await self._positions.committed_offset(owner.stream)
        if data is None:
            if committed is not None:
                log.warning(
                    "no checkpoint for %s, but the group committed offset %d (an at-least-once run?): "
                    "continuing there with empty state; bars spanning that point are partial",
                    owner.stream,
                    committed,
                )
            owner.offset = committed
        owner.checkpoint = data
        return committed

    async def _restore(self, owner: PartitionOwner, reason: str, group_offset: int | None = None) -> None:
        """Install the owner's last committed checkpoint (or empty state), seek to it, go
        live. ``group_offset``: on assignment, the group's committed offset (for the
        count of records consumed again)."""
        stream = owner.stream
        position = self._positions.partitions[stream].next_offset
        if owner.checkpoint is not None:
            engine, meta = decode_checkpoint(
                owner.checkpoint, self._specs, self._lateness_ns, self._limits, self._revision_window_ns
            )
            owner.offset = int(meta["offset"])
            owner.sink_states = dict(meta.get("sinks", {}))
            owner.epoch = int(meta.get("epoch", 0))
        else:
            engine = Engine(self._specs, self._lateness_ns, self._limits, self._revision_window_ns)
            owner.sink_states = {}
        for sink in self._sinks:
            await sink.restore(stream, owner.sink_states.get(sink.name), owner.offset or 0)
        self._partitions.install(stream, engine, restored_counts=reason == "assignment")
        await self._positions.seek(stream, owner.offset)
        self._positions.resume(stream)
        owner.records_at = engine.stats.records
        owner.dirty = False
        owner.last_at = time.monotonic()
        owner.restores += 1
        await owner.open_transaction.begin()
        self._metrics.restores.labels(reason=reason).inc()
        done = position if reason == "rewind" else group_offset
        rewound = max(0, (done or 0) - (owner.offset or 0))
        self._metrics.offsets_rewound.inc(rewound)
        # No end-offset lookup for the log line: at the end of a partition it queues
        # behind the consumer's long-poll fetch (up to fetch_max_wait_ms, 0.5 s) on the
        # same connection, and eight of those in one assignment callback outlasted the
        # session timeout, so the group kept evicting the member (a rebalance loop).
        where = f"offset {owner.offset:,}" if owner.offset is not None else "the beginning"
        origin = f"its checkpoint (epoch {owner.epoch})" if owner.checkpoint is not None else "empty state"
        self._partitions.move(
            stream,
            LIVE,
            "restored from %s on %s at %s: %d books, %d open bars; %d records rewound",
            origin,
            reason,
            where,
            engine.symbols,
            engine.open_bar_count(),
            rewound,
        )

    # -- failures -------------------------------------------------------------------------

    def _owner(self, stream: str) -> PartitionOwner:
        owner = self._owners.get(stream)
        if owner is None:
            raise StateError(f"partition {stream} has no owner here (not assigned, or revoked)")
        return owner

    @contextlib.asynccontextmanager
    async def _rewind_on_bus_failure(self, owner: PartitionOwner) -> AsyncIterator[None]:
        """A bus failure inside fails the partition's transaction (and rewinds it);
        anything else is a bug and propagates."""
        try:
            yield
        except Exception as exc:
            if not is_bus_failure(exc):
                raise
            await self.fail(owner, exc)

    @contextlib.contextmanager
    def _retry_later(self, what: str) -> Iterator[None]:
        """A bus failure inside is logged and left for housekeeping to retry; anything
        else (an unreadable checkpoint, a bug) propagates."""
        try:
            yield
        except Exception as exc:
            if not is_bus_failure(exc):
                raise
            log.warning("%s yet (%s); retrying", what, exc)
