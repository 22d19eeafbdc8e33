"""Bar families: where a bar starts, when it closes, what per-symbol state outlives it.

A :class:`BarFamily` is the sampling rule of one bar spec. The engine asks it, per
symbol and message, through a few fixed calls -- it has no family-specific code:

* ``window(t, state)`` -- a message at ``t`` opens a bar (the symbol has none open):
  its ``(start, end, seal_at)``; or ``start`` = :data:`DECLINE`: this family takes no
  bar for the message (outside its sessions; counted per spec). A later message of the symbol at or after ``seal_at``
  *seals* the bar (it can receive nothing more): a bar closed by time then waits to
  be due, any other is emitted, complete. Time families answer their interval
  (``seal_at`` = ``end``); event families the trade's own time and :data:`NEVER`.
* ``closes_by_time`` -- the bar closes when the stream's watermark, less the lateness,
  reaches its ``end`` (it waits in the engine's due-heap); a message for a window
  already closed is *late* for it. Otherwise the bar closes on its own trade.
* ``opens_on_trade`` -- only a trade opens a bar (event families); otherwise any
  message does.
* ``trade(bar, state, px, qty, t)`` -- a trade of the open bar (``counts_trades``
  families only): returns True when the bar has reached its closing condition; it
  closes after the message's quote changes.
* ``new_state(symbol)`` / ``state_to_data`` / ``state_from_data`` -- per-symbol state
  that outlives a bar (none for ``time`` and the thresholds; a session family keeps the
  symbol's venue and last close there), and its checkpoint form.
* ``columns`` -- columns of the family's own (after the frame's); a family with columns
  gets ``opened(bar, state)`` when a bar opens (to tag it: ``bar.tag``, plain data) and
  ``emit(row, bar, state, index)`` when it closes, to fill them in (``index``: column
  name → position in the row).
* ``fills`` -- the family wants a bar for every interval inside its sessions, traded
  or not: ``next_window(end, state)`` gives the interval after one that ended at
  ``end`` (or None). The engine keeps the symbol's next interval open as a bar
  without messages, and opens the ones a later message skips.

A family is registered under its spec keyword (:func:`register_family`) with a parser
of the spec's argument.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Final

from mypy_extensions import mypyc_attr

from barsmith.bars.calendar import Calendars
from barsmith.bars.columns import Column
from barsmith.bars.group import StatOptions

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

NEVER: Final = 2**62 - 1  # seal_at of a bar no later message seals (still a small int when compiled)
DECLINE: Final = -1  # window()'s start when the family takes no bar for the message


@dataclass(frozen=True, slots=True)
class SpecContext:
    """What a family's parser may need beyond its argument."""

    calendars: Calendars | None = None  # trading calendars (the sessions settings)
    outside: str = "drop"  # session families: "drop" messages outside sessions, or give them "bars"
    revisions: bool = False  # bars may be revised (revision_window_ms > 0): they carry ``revision``
    statistics: StatOptions | None = None  # settings of statistic groups (the ``statistics`` settings)


@mypyc_attr(allow_interpreted_subclasses=True)  # an extension point: may be subclassed outside barsmith
class BarFamily:
    """The sampling rule of one bar spec (see the module docstring)."""

    def __init__(
        self,
        keyword: str,
        closes_by_time: bool,
        opens_on_trade: bool,
        counts_trades: bool,
        columns: tuple[Column, ...] = (),
        fills: bool = False,
    ) -> None:
        self.keyword = keyword
        self.closes_by_time = closes_by_time
        self.opens_on_trade = opens_on_trade
        self.counts_trades = counts_trades
        self.columns = columns
        self.has_columns = bool(columns)
        self.fills = fills

    def window(self, t: int, state: Any) -> tuple[int, int, int]:
        """(start, end, seal_at) of a bar opened by a message at ``t``; ``start`` is
        :data:`DECLINE` when the family takes no bar for it."""
        raise NotImplementedError

    def next_window(self, end: int, state: Any) -> tuple[int, int] | None:
        """``fills`` families: (start, end) of the interval after one that ended at ``end``."""
        return None

    def opened(self, bar: OpenBar, state: Any) -> None:
        """A bar of a family with columns opened: tag it (``bar.tag``)."""
        return None

    def emit(self, row: list[Any], bar: OpenBar, state: Any, index: dict[str, int]) -> None:
        """A bar of a family with columns closes: fill in the family's columns of ``row``."""
        return None

    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        """A trade of ``bar``; True when the bar reached its closing condition."""
        return False

    def new_state(self, symbol: str) -> Any:
        """Per-symbol state that outlives a bar (None: the family keeps none)."""
        return None

    def state_to_data(self, state: Any) -> Any:
        return None

    def state_from_data(self, symbol: str, data: Any) -> Any:
        return None


FamilyParser = Callable[[str, str, SpecContext], BarFamily]
"""``(spec text, argument, context) -> family``; raises :class:`~barsmith.errors.BarSpecError`."""

FAMILIES: dict[str, FamilyParser] = {}
"""Spec keyword → parser of the argument (filled by :func:`register_family`)."""

FAMILY_COLUMNS: dict[str, tuple[Column, ...]] = {}
"""Spec keyword → the columns of the family's own, for the column table."""


def register_family(keyword: str, parser: FamilyParser, columns: tuple[Column, ...] = ()) -> None:
    """Make ``keyword:<argument>`` specs build families with ``parser`` (whose bars have
    ``columns`` of the family's own)."""
    if keyword in FAMILIES:
        raise ValueError(f"bar family {keyword!r} registered twice")
    FAMILIES[keyword] = parser
    if columns:
        FAMILY_COLUMNS[keyword] = columns
