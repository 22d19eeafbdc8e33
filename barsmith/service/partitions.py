"""The input partitions this process holds: each one's state and engine, and what the
engines counted.

A partition's life is a :class:`PartitionState`; the delivery strategy moves it,
and a move the table below does not allow raises :class:`~barsmith.errors.StateError`
naming the partition::

    (assigned) ──► RESTORING ──► LIVE ◄──► FAILED ◄── FENCED
                                  │                     ▲
                                  └─────────────────────┘

* ``restoring`` — assigned; its checkpoint is being read and restored (input paused);
* ``live`` — consuming and delivering;
* ``failed`` — its open transaction failed; rewinding to the last committed checkpoint
  (input paused until then);
* ``fenced`` — another producer took its transactional id; standing back until the
  group revokes it, or taking it back (→ failed, then rewound) if the group does not.

At-least-once partitions are live from assignment to revocation. Every move is one
log line naming the partition and both states; the gauge
``barsmith_partitions{state}`` counts the partitions in each state.
"""

from __future__ import annotations

import logging
from enum import StrEnum
from typing import Any

from barsmith.engine import Engine, EngineStats
from barsmith.errors import StateError

log = logging.getLogger("barsmith.partitions")


class PartitionState(StrEnum):
    """Where a held input partition is in its life (see the module doc)."""

    RESTORING = "restoring"
    LIVE = "live"
    FAILED = "failed"
    FENCED = "fenced"


_MOVES: dict[PartitionState, frozenset[PartitionState]] = {
    PartitionState.RESTORING: frozenset({PartitionState.LIVE}),
    PartitionState.LIVE: frozenset({PartitionState.FAILED, PartitionState.FENCED}),
    PartitionState.FAILED: frozenset({PartitionState.LIVE}),
    PartitionState.FENCED: frozenset({PartitionState.FAILED}),
}
_FIRST = frozenset({PartitionState.RESTORING, PartitionState.LIVE})


class Partitions:
    """The held partitions' states and engines; the counters of engines let go.

    A restored engine carries the stream's counters so far: this process reports only
    what it adds to them (``total_stats``), so metrics and the summary count this
    process's own work.
    """

    def __init__(self) -> None:
        self.engines: dict[str, Engine] = {}  # the runner's engine table
        self._states: dict[str, PartitionState] = {}
        self._baselines: dict[str, EngineStats] = {}  # restored counters, per stream
        self._retired = EngineStats()  # counters of engines whose partitions were let go

    # -- states ----------------------------------------------------------------------

    def hold(self, stream: str, state: PartitionState) -> None:
        """``stream`` was assigned here and starts in ``state`` (restoring or live)."""
        if stream in self._states:
            raise StateError(f"partition {stream} is already held here ({self._states[stream]})")
        if state not in _FIRST:
            raise StateError(f"partition {stream} cannot start {state}: a new partition is restoring or live")
        self._states[stream] = state

    def state(self, stream: str) -> PartitionState | None:
        """``stream``'s state, or None when it is not held here."""
        return self._states.get(stream)

    def is_live(self, stream: str) -> bool:
        return self._states.get(stream) is PartitionState.LIVE

    def move(self, stream: str, to: PartitionState, why: str, *args: Any, level: int = logging.INFO) -> None:
        """Move ``stream`` to ``to`` and log it (``why % args`` says what happened)."""
        now = self._states.get(stream)
        if now is None:
            raise StateError(f"partition {stream} is not held here: it cannot become {to}")
        if to not in _MOVES[now]:
            raise StateError(f"partition {stream} cannot go from {now} to {to}")
        self._states[stream] = to
        log.log(level, "%s: %s -> %s: " + why, stream, now, to, *args)

    def in_state(self, *states: PartitionState) -> list[str]:
        """The held streams in any of ``states``, in the order they were assigned."""
        return [stream for stream, state in self._states.items() if state in states]

    def by_state(self) -> dict[PartitionState, int]:
        """How many held partitions are in each state (every state, zeros included)."""
        counts = dict.fromkeys(PartitionState, 0)
        for state in self._states.values():
            counts[state] += 1
        return counts

    # -- engines ---------------------------------------------------------------------

    def install(self, stream: str, engine: Engine, *, restored_counts: bool) -> None:
        """Use ``engine`` for ``stream``. ``restored_counts``: its counters so far are the
        stream's earlier history (a restore on assignment), not this process's work."""
        self.engines[stream] = engine
        if restored_counts:
            self._baselines[stream] = engine.stats.copy()

    def release(self, stream: str) -> bool:
        """Let go of ``stream`` (revoked), keeping its engine's counters in the totals;
        returns whether it had an engine."""
        self._states.pop(stream, None)
        engine = self.engines.pop(stream, None)
        baseline = self._baselines.pop(stream, None)
        if engine is not None:
            self._retired.add(_own_counts(engine, baseline))
        return engine is not None

    def total_stats(self) -> EngineStats:
        """What this process counted, on the engines it holds and those it let go."""
        total = EngineStats()
        for stream, engine in self.engines.items():
            total.add(_own_counts(engine, self._baselines.get(stream)))
        total.add(self._retired)
        return total


def _own_counts(engine: Engine, baseline: EngineStats | None) -> EngineStats:
    """What this process counted on ``engine``: without the counters a restore brought."""
    return engine.stats.since(baseline) if baseline is not None else engine.stats
