"""The partition state machine: the moves it allows, and a StateError naming the
partition for every other one; the counters of partitions let go."""

from __future__ import annotations

import itertools
import logging

import pytest
from factories import run_engine, trade

from barsmith.errors import StateError
from barsmith.service.partitions import Partitions, PartitionState

RESTORING, LIVE, FAILED, FENCED = (
    PartitionState.RESTORING,
    PartitionState.LIVE,
    PartitionState.FAILED,
    PartitionState.FENCED,
)
ALLOWED = {(RESTORING, LIVE), (LIVE, FAILED), (LIVE, FENCED), (FAILED, LIVE), (FENCED, FAILED)}
# The one way to reach each state from a new (restoring) partition.
PATH = {RESTORING: [], LIVE: [LIVE], FAILED: [LIVE, FAILED], FENCED: [LIVE, FENCED]}


def held_in(state: PartitionState) -> Partitions:
    partitions = Partitions()
    partitions.hold("ticks[3]", RESTORING)
    for step in PATH[state]:
        partitions.move("ticks[3]", step, "test")
    assert partitions.state("ticks[3]") is state
    return partitions


@pytest.mark.parametrize(("start", "to"), sorted(ALLOWED))
def test_allowed_moves_are_logged_with_both_states(
    start: PartitionState, to: PartitionState, caplog: pytest.LogCaptureFixture
) -> None:
    partitions = held_in(start)
    with caplog.at_level(logging.INFO, logger="barsmith.partitions"):
        partitions.move("ticks[3]", to, "because %s", "reasons", level=logging.WARNING)
    assert partitions.state("ticks[3]") is to
    assert caplog.records[-1].getMessage() == f"ticks[3]: {start.value} -> {to.value}: because reasons"
    assert caplog.records[-1].levelno == logging.WARNING


@pytest.mark.parametrize(
    ("start", "to"), [pair for pair in itertools.product(PartitionState, repeat=2) if pair not in ALLOWED]
)
def test_every_other_move_is_a_state_error_naming_the_partition(start: PartitionState, to: PartitionState) -> None:
    partitions = held_in(start)
    with pytest.raises(StateError, match=rf"partition ticks\[3\] cannot go from {start.value} to {to.value}"):
        partitions.move("ticks[3]", to, "test")
    assert partitions.state("ticks[3]") is start


def test_a_partition_starts_restoring_or_live_once() -> None:
    partitions = Partitions()
    for state in (FAILED, FENCED):
        with pytest.raises(StateError, match=r"ticks\[1\] cannot start"):
            partitions.hold("ticks[1]", state)
    partitions.hold("ticks[1]", LIVE)
    with pytest.raises(StateError, match=r"ticks\[1\] is already held here \(live\)"):
        partitions.hold("ticks[1]", RESTORING)
    with pytest.raises(StateError, match=r"ticks\[2\] is not held here"):
        partitions.move("ticks[2]", LIVE, "test")


def test_states_are_counted_for_the_gauge() -> None:
    partitions = held_in(FENCED)
    partitions.hold("ticks[4]", LIVE)
    partitions.hold("ticks[5]", RESTORING)
    assert partitions.by_state() == {RESTORING: 1, LIVE: 1, FAILED: 0, FENCED: 1}
    assert partitions.in_state(LIVE, FENCED) == ["ticks[3]", "ticks[4]"]
    assert partitions.is_live("ticks[4]") and not partitions.is_live("ticks[3]")


def test_counters_count_this_process_only_and_survive_release() -> None:
    records = [trade("FENWORTH~KESMOOR", 1_000 + i, i + 1, 10.0, 1.0) for i in range(5)]
    restored = run_engine(records, finish=False)[1]  # as if restored with 5 records' history
    fresh = run_engine(records[:3], finish=False)[1]
    partitions = Partitions()
    partitions.hold("ticks[0]", LIVE)
    partitions.hold("ticks[1]", LIVE)
    partitions.install("ticks[0]", restored, restored_counts=True)
    partitions.install("ticks[1]", fresh, restored_counts=False)
    assert partitions.total_stats().records == 3
    assert partitions.release("ticks[1]") and not partitions.release("ticks[9]")
    assert partitions.state("ticks[1]") is None and "ticks[1]" not in partitions.engines
    assert partitions.total_stats().records == 3  # kept after release
