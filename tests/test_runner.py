"""The run loop without an event loop (replay's): signals, pauses, and what it refuses."""

from __future__ import annotations

import asyncio
import os
import signal
from collections.abc import AsyncIterator

import pytest
from factories import T0, trade

from barsmith.bars.spec import parse_specs
from barsmith.runner import Runner
from barsmith.sinks.base import MemorySink
from barsmith.sources.base import ListSource, RecordBatch, pause


def _batches(count: int) -> list[RecordBatch]:
    out = []
    for n in range(count):
        record = trade("FENWORTH~KESMOOR", T0 + n * 60_000_000_000, n + 1, 10.0 + n, 1.0)
        out.append(RecordBatch("replay", "test", [record], [n]))
    return out


class _SignallingSource(ListSource):
    """Sends this process ``signals`` real signals after the first batch, pausing between batches."""

    def __init__(self, batches: list[RecordBatch], signals: int) -> None:
        super().__init__(batches)
        self._signals = signals

    async def batches(self) -> AsyncIterator[RecordBatch]:
        for index, batch in enumerate(self._batches):
            if self._stopped:
                return
            yield batch
            await pause()
            if index == 0:
                for _ in range(self._signals):
                    os.kill(os.getpid(), signal.SIGINT)


def _runner(source: ListSource, sink: MemorySink) -> Runner:
    return Runner(parse_specs(["time:1m"]), 0, source, [sink], sink)


def test_a_signal_stops_a_run_without_event_loop_cleanly_and_the_handler_is_put_back() -> None:
    before = signal.getsignal(signal.SIGINT)
    sink = MemorySink()
    runner = _runner(_SignallingSource(_batches(10), signals=1), sink)
    summary = runner.run(event_loop=False)
    assert summary.interrupted and not runner.force_exit
    assert summary.stats.records < 10  # it stopped fetching
    assert sink.bars and not sink.bars[-1].complete and sink.flushes == 1  # open bars flushed, incomplete
    assert signal.getsignal(signal.SIGINT) is before


def test_a_second_signal_forces_the_exit() -> None:
    sink = MemorySink()
    runner = _runner(_SignallingSource(_batches(10), signals=2), sink)
    forced: list[bool] = []
    runner.on_force_exit = lambda: forced.append(True)
    summary = runner.run(event_loop=False)
    assert summary.interrupted and runner.force_exit and forced == [True]
    assert sink.flushes == 0  # a forced exit skips the flush


def test_both_drivers_give_the_same_bars() -> None:
    loop_free, with_loop = MemorySink(), MemorySink()
    _runner(ListSource(_batches(5)), loop_free).run(event_loop=False)
    _runner(ListSource(_batches(5)), with_loop).run()
    assert [b.values for b in loop_free.bars] == [b.values for b in with_loop.bars]


def test_waiting_on_io_without_an_event_loop_fails_loudly() -> None:
    class _Waiting(ListSource):
        async def batches(self) -> AsyncIterator[RecordBatch]:
            await asyncio.sleep(0.01)  # a real wait: needs an event loop
            for batch in self._batches:
                yield batch

    with pytest.raises(RuntimeError, match="event loop"):
        _runner(_Waiting(_batches(2)), MemorySink()).run(event_loop=False)
