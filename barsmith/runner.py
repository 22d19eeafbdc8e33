"""The run loop: source → engines → sinks, owned by one :class:`Runner`.

``Runner.run()`` is the synchronous entry; ``serve()`` installs signal handling,
then ``startup()`` → ``main_loop()`` → ``shutdown()``. Signal handlers only set
flags: the first SIGINT/SIGTERM asks for a clean stop (stop fetching, close what is
final, flush, close), a second one ``force_exit`` skips the flush.

Replay and the live service differ only in their source: a replay source ends when
its files are drained; a live source ends when asked to stop.
"""

from __future__ import annotations

import contextlib
import gc
import signal
import sys
import time
from collections.abc import Callable, Coroutine, Sequence
from dataclasses import dataclass, field
from types import FrameType
from typing import Any, TypeVar

from barsmith.bars.spec import BarSpec
from barsmith.engine import Engine, EngineStats
from barsmith.ingest.eventtime import StreamLimits
from barsmith.sinks.base import BarSink, RejectSink
from barsmith.sources.base import RecordBatch, Source

GC_YOUNG_THRESHOLD = 200_000
_T = TypeVar("_T")


@dataclass(slots=True)
class RunSummary:
    """What a run did; printed at the end of ``barsmith replay``."""

    stats: EngineStats = field(default_factory=EngineStats)
    elapsed_s: float = 0.0
    interrupted: bool = False

    @property
    def ticks_per_s(self) -> float:
        return self.stats.records / self.elapsed_s if self.elapsed_s > 0 else 0.0

    def lines(self) -> list[str]:
        s = self.stats
        rejected = sum(s.rejected.values())
        by_reason = ", ".join(f"{k} {v:,}" for k, v in sorted(s.rejected.items())) or "none"
        lines = [
            f"messages read   {s.records:>14,}",
            f"accepted        {s.accepted:>14,}",
            f"duplicates      {s.duplicates:>14,}",
            f"sequence gaps   {s.gaps:>14,}",
            f"late (time bars){s.late:>14,}",
            f"time regressions{s.time_regressions:>14,}",
            f"rejected        {rejected:>14,}  ({by_reason})",
        ]
        for spec, count in s.bars.items():
            lines.append(f"bars {spec:<11}{count:>14,}")
        if s.revisions:
            lines.append(f"revised bars    {s.revisions:>14,}")
        for spec, count in s.outside.items():
            lines.append(f"outside sessions, {spec}: {count:,} messages (not in its bars)")
        lines.append(f"elapsed         {self.elapsed_s:>14.2f} s   ({self.ticks_per_s:,.0f} ticks/s)")
        if self.interrupted:
            lines.append("interrupted: open bars were flushed as incomplete")
        return lines


ProgressHook = Callable[[Source, EngineStats, float], None]


class Runner:
    """Feeds one source through per-stream engines into the sinks."""

    def __init__(
        self,
        specs: Sequence[BarSpec],
        lateness_ns: int,
        source: Source,
        sinks: Sequence[BarSink],
        reject_sink: RejectSink,
        progress: ProgressHook | None = None,
        housekeeping_interval_s: float | None = None,
        limits: StreamLimits | None = None,
        engines: dict[str, Engine] | None = None,
        revision_window_ns: int = 0,
    ) -> None:
        """``limits``: the event-time guards and bounds of every engine (default: the
        defaults); ``engines``: the table of per-stream engines to fill (default: a new one)."""
        self.specs = tuple(specs)
        self.lateness_ns = lateness_ns
        self.limits = limits
        self.revision_window_ns = revision_window_ns
        self.source = source
        self.sinks = tuple(sinks)
        self.reject_sink = reject_sink
        self.engines: dict[str, Engine] = engines if engines is not None else {}
        self.should_exit = False
        self.force_exit = False
        self._progress = progress
        self._started = 0.0
        self._housekeeping_interval_s = housekeeping_interval_s
        self._next_housekeeping = 0.0
        # Called on a second signal; the CLI makes it exit the process at once.
        self.on_force_exit: Callable[[], None] | None = None

    # -- lifecycle -------------------------------------------------------------------

    def run(self, *, event_loop: bool = True) -> RunSummary:
        """Run to the end of the source (or a signal) and return the summary.

        ``event_loop=False`` runs without asyncio, for a source and sinks that never
        wait on I/O (replay's files and Parquet): their coroutines only pause between
        batches, and importing and starting an event loop would be a good part of a
        small file's whole run. One that does wait fails with ``RuntimeError``."""
        if event_loop:
            import asyncio

            return asyncio.run(self.serve())
        return _run_to_end(self.serve())

    async def serve(self) -> RunSummary:
        # The hot loop allocates millions of short-lived, acyclic objects (decoded
        # records, ticks); the default young-generation threshold (700) makes the
        # cyclic collector run thousands of times for nothing. Freeze what start-up
        # built and collect rarely; restore the previous setting afterwards.
        old_threshold = gc.get_threshold()
        gc.collect()
        gc.freeze()
        gc.set_threshold(GC_YOUNG_THRESHOLD, *old_threshold[1:])
        try:
            return await self._serve()
        finally:
            gc.set_threshold(*old_threshold)
            gc.unfreeze()

    async def _serve(self) -> RunSummary:
        remove_handlers = self._install_signal_handlers()
        try:
            try:
                await self.startup()
                await self.main_loop()
            except BaseException:
                await self.abort()
                raise
            return await self.shutdown()
        finally:
            remove_handlers()

    def _install_signal_handlers(self) -> Callable[[], None]:
        """SIGINT and SIGTERM call :meth:`handle_exit` (through the event loop when one
        runs); returns what puts the previous handlers back."""
        loop = _running_loop()
        installed: list[signal.Signals] = []
        previous: dict[signal.Signals, Any] = {}
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                if loop is not None:
                    loop.add_signal_handler(sig, self.handle_exit, sig)
                    installed.append(sig)
                else:
                    previous[sig] = signal.signal(sig, self._on_signal)
            except (NotImplementedError, RuntimeError, ValueError):  # not the main thread
                pass

        def remove() -> None:
            for sig in installed:
                loop.remove_signal_handler(sig)
            for sig, handler in previous.items():
                signal.signal(sig, handler)

        return remove

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        self.handle_exit(signal.Signals(signum))

    def handle_exit(self, sig: signal.Signals | None = None) -> None:
        """Signal handler: the first call asks for a clean stop, a second forces it."""
        if self.should_exit:
            self.force_exit = True
            if self.on_force_exit is not None:
                self.on_force_exit()
        self.should_exit = True
        self.source.stop()

    async def startup(self) -> None:
        self._started = time.perf_counter()
        for sink in self.sinks:
            await sink.start()

    async def main_loop(self) -> None:
        interval = self._housekeeping_interval_s
        async for batch in self.source.batches():
            if batch.records or batch.rejects:
                await self.process_batch(batch)
            if interval is not None:
                # Periodic jobs hang off this one tick, each gated by when it last ran.
                now = time.monotonic()
                if now >= self._next_housekeeping:
                    self._next_housekeeping = now + interval
                    await self.housekeeping(now)
            if self._progress is not None:
                self._progress(self.source, self.total_stats(), time.perf_counter() - self._started)
            if self.should_exit:
                break

    async def abort(self) -> None:
        """After a failure: close everything without flushing, ignoring further errors."""
        for closer in [*(sink.close for sink in self.sinks), self.reject_sink.close, self.source.close]:
            # Best effort: the original error is the one that matters.
            with contextlib.suppress(Exception):
                await closer()

    async def housekeeping(self, now: float) -> None:
        """Periodic work between batches (idle rule, commits, drain mode); none in replay."""

    async def shutdown(self) -> RunSummary:
        """Close what is final, flush the sinks, close; in that order."""
        if not self.force_exit:
            await self.final_flush()
        for sink in self.sinks:
            await sink.close()
        await self.reject_sink.close()
        await self.source.close()
        return RunSummary(self.total_stats(), time.perf_counter() - self._started, self.should_exit)

    async def final_flush(self) -> None:
        """Close open bars (input ended), hand them over, flush the sinks."""
        for stream, engine in self.engines.items():
            engine.finish()
            await self.deliver(stream, engine)
        for sink in self.sinks:
            await sink.flush()

    # -- work ------------------------------------------------------------------------

    def engine_for(self, stream: str) -> Engine:
        engine = self.engines.get(stream)
        if engine is None:
            engine = self.engines[stream] = Engine(self.specs, self.lateness_ns, self.limits, self.revision_window_ns)
        return engine

    async def process_batch(self, batch: RecordBatch) -> None:
        engine = self.engine_for(batch.stream)
        for reject in batch.rejects:
            engine.reject(reject)
        engine.process(batch.records, batch.positions, batch.source)
        await self.deliver(batch.stream, engine)

    async def deliver(self, stream: str, engine: Engine) -> None:
        """Hand an engine's finished bars and rejects to the sinks (with a revision
        window: every revision, or each bar once when final, as each sink asks)."""
        bars = engine.take_bars()
        final = engine.take_final_bars() if engine.revisions else bars
        for sink in self.sinks:
            mine = final if sink.final_only else bars
            if mine:
                await sink.publish(stream, mine)
        rejects = engine.take_rejects()
        if rejects:
            await self.reject_sink.write(rejects)

    def total_stats(self) -> EngineStats:
        total = EngineStats()
        for engine in self.engines.values():
            total.add(engine.stats)
        return total


def _running_loop() -> Any:
    """The running asyncio event loop, or None (a running loop means asyncio is imported)."""
    asyncio = sys.modules.get("asyncio")
    if asyncio is None:
        return None
    try:
        return asyncio.get_running_loop()
    except RuntimeError:
        return None


def _run_to_end(coroutine: Coroutine[Any, Any, _T]) -> _T:
    """Run ``coroutine`` without an event loop: it may only pause (bare yields, as
    :func:`barsmith.sources.base.pause` and ``asyncio.sleep(0)`` do), never wait."""
    while True:
        try:
            waited = coroutine.send(None)
        except StopIteration as done:
            result: _T = done.value
            return result
        if waited is not None:
            coroutine.close()
            raise RuntimeError(f"a run without an event loop waited on {waited!r}; use run(event_loop=True)")
