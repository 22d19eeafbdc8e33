"""A bar being built (:class:`OpenBar`) and what the bars of one spec carry (:class:`BarLayout`).

An open bar is a frame -- symbol, spec, start, end, the messages and gaps among them,
the family's progress towards its closing condition -- plus one accumulator per
statistic group its spec carries (:mod:`barsmith.bars.group`). When it closes it
becomes a :class:`~barsmith.bars.record.Bar`: the frame's columns, each group's, and
``complete``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from barsmith.bars.columns import FRAME_HEAD, FRAME_TAIL, REVISION, Column
from barsmith.bars.core import CORE
from barsmith.bars.family import BarFamily
from barsmith.bars.group import Accumulator, StatGroup
from barsmith.bars.record import Bar
from barsmith.bars.spread import SPREAD

__all__ = ["BAR_COLUMNS", "DEFAULT_COLUMNS", "Bar", "BarLayout", "OpenBar", "layout_columns"]


def layout_columns(
    groups: Sequence[StatGroup], family_columns: Sequence[Column] = (), revisions: bool = False
) -> tuple[Column, ...]:
    """The columns of a bar carrying ``groups`` (and its family's own; ``revision`` when
    bars may be revised), in order."""
    columns: list[Column] = [*FRAME_HEAD, *family_columns]
    for group in groups:
        columns.extend(group.columns)
    if revisions:
        columns.append(REVISION)
    columns.extend(FRAME_TAIL)
    return tuple(columns)


DEFAULT_COLUMNS: tuple[Column, ...] = layout_columns((CORE, SPREAD))
BAR_COLUMNS: tuple[str, ...] = tuple(column.name for column in DEFAULT_COLUMNS)
"""The columns of a bar carrying the default groups (``core`` and ``spread``)."""


class BarLayout:
    """What the bars of one spec carry: the family, the groups and their columns, and
    which accumulators take which hook. ``tracker_index`` numbers the tracked
    quantities of the whole engine (a symbol follows each once)."""

    def __init__(
        self,
        spec_text: str,
        family: BarFamily,
        groups: Sequence[StatGroup],
        tracker_index: dict[str, int],
        revisions: bool = False,
    ) -> None:
        self.spec_text = spec_text
        self.family = family
        self.groups = tuple(groups)
        self.revisions = revisions
        self.columns = layout_columns(self.groups, family.columns, revisions)
        self.names = tuple(column.name for column in self.columns)
        self.index = {name: i for i, name in enumerate(self.names)}
        self.family_width = len(family.columns)
        self.trade_accs: list[int] = [j for j, group in enumerate(self.groups) if group.on_trade]
        self.book_accs: list[int] = [j for j, group in enumerate(self.groups) if group.on_closing_book]
        self.quote_accs: list[int] = [j for j, group in enumerate(self.groups) if group.on_quote]
        self.signs = any(group.signs for group in self.groups)
        # Per engine tracker: the (accumulator, slot) pairs that weight it by time.
        self.held: list[list[tuple[int, int]]] = [[] for _ in tracker_index]
        self.tracked: list[tuple[int, int, int]] = []  # (tracker, accumulator, slot), flat
        for j, group in enumerate(self.groups):
            for slot, tracker in enumerate(group.trackers):
                k = tracker_index[tracker.name]
                self.held[k].append((j, slot))
                self.tracked.append((k, j, slot))

    def new_bar(self, symbol: str, start: int, end: int, seal_at: int) -> OpenBar:
        bar = OpenBar(self.spec_text, symbol, start, end, seal_at)
        bar.accs = [group.accumulator() for group in self.groups]
        return bar

    def bar_from_state(self, data: list[Any]) -> OpenBar:
        """Inverse of :meth:`OpenBar.to_state` for a bar of this layout."""
        bar = self.new_bar(str(data[0]), int(data[1]), int(data[2]), int(data[3]))
        bar.messages, bar.gaps, bar.progress = int(data[4]), int(data[5]), float(data[6])
        bar.tag = data[8] if len(data) > 8 else None
        bar.revision = int(data[9]) if len(data) > 9 else -1
        states: list[Any] = data[7]
        if len(states) != len(bar.accs):
            raise ValueError(f"a bar of {self.spec_text} has {len(bar.accs)} groups, the checkpoint {len(states)}")
        for acc, state in zip(bar.accs, states, strict=True):
            acc.restore(state)
        return bar


class OpenBar:
    """A bar being built: its frame, and an accumulator per statistic group."""

    __slots__ = (
        "accs",
        "end",
        "gaps",
        "messages",
        "progress",
        "revision",
        "seal_at",
        "spec_text",
        "start",
        "symbol",
        "tag",
    )

    def __init__(self, spec_text: str, symbol: str, start: int, end: int, seal_at: int) -> None:
        self.spec_text = spec_text
        self.symbol = symbol
        self.start = start
        self.end = end
        self.seal_at = seal_at  # a later message of the symbol at or after this seals the bar
        self.messages = 0
        self.gaps = 0
        self.progress = 0.0  # the family's measure towards its closing condition
        self.tag: Any = None  # the family's plain data about this bar (families with columns)
        self.revision = -1  # its last publication's revision (-1: not published yet)
        self.accs: list[Accumulator] = []

    def finish(self, layout: BarLayout, complete: bool, empty_window: bool, family_state: Any) -> Bar:
        """The output record. ``empty_window``: an event bar whose window has zero length."""
        row: list[Any] = [self.symbol, self.spec_text, self.start, self.end]
        if layout.family_width:
            row.extend([None] * layout.family_width)
        for acc in self.accs:
            acc.emit(row, self, empty_window)
        if layout.revisions:
            row.append(self.revision if self.revision >= 0 else 0)
        row.append(complete)
        if layout.family_width:
            layout.family.emit(row, self, family_state, layout.index)
        return Bar(layout.names, row)

    def to_state(self) -> list[Any]:
        """The bar as plain data (its spec is known from where it is stored)."""
        return [
            self.symbol,
            self.start,
            self.end,
            self.seal_at,
            self.messages,
            self.gaps,
            self.progress,
            [acc.to_state() for acc in self.accs],
            self.tag,
            self.revision,
        ]

    def copy(self, layout: BarLayout) -> OpenBar:
        """An independent copy (its accumulators too): a published bar that may still be
        revised stays open while its copy is sealed and published."""
        return layout.bar_from_state(self.to_state())
