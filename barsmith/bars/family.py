"""Bar families: where a bar starts, when it closes, what per-symbol state outlives it.

A :class:`BarFamily` is the sampling rule of one bar spec. The engine asks it, per
symbol and message, through a few fixed calls -- it has no family-specific code:

* ``window(t)`` -- a message at ``t`` opens a bar (the symbol has none open): its
  ``(start, end, seal_at)``. A later message of the symbol at or after ``seal_at``
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
* ``new_state()`` / ``state_to_data`` / ``state_from_data`` -- per-symbol state that
  outlives a bar (none for the built-in families; an imbalance family keeps its
  expectations here), and its checkpoint form.

A family is registered under its spec keyword (:func:`register_family`) with a parser
of the spec's argument.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any, Final

from mypy_extensions import mypyc_attr

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

NEVER: Final = 2**62 - 1  # seal_at of a bar no later message seals (still a small int when compiled)


@mypyc_attr(allow_interpreted_subclasses=True)  # an extension point: may be subclassed outside barsmith
class BarFamily:
    """The sampling rule of one bar spec (see the module docstring)."""

    def __init__(self, keyword: str, closes_by_time: bool, opens_on_trade: bool, counts_trades: bool) -> None:
        self.keyword = keyword
        self.closes_by_time = closes_by_time
        self.opens_on_trade = opens_on_trade
        self.counts_trades = counts_trades

    def window(self, t: int) -> tuple[int, int, int]:
        """(start, end, seal_at) of a bar opened by a message at ``t``."""
        raise NotImplementedError

    def trade(self, bar: OpenBar, state: Any, px: float, qty: float, t: int) -> bool:
        """A trade of ``bar``; True when the bar reached its closing condition."""
        return False

    def new_state(self) -> Any:
        """Per-symbol state that outlives a bar (None: the family keeps none)."""
        return None

    def state_to_data(self, state: Any) -> Any:
        return None

    def state_from_data(self, data: Any) -> Any:
        return None


FamilyParser = Callable[[str, str], BarFamily]
"""``(spec text, argument) -> family``; raises :class:`~barsmith.errors.BarSpecError`."""

FAMILIES: dict[str, FamilyParser] = {}
"""Spec keyword → parser of the argument (filled by :func:`register_family`)."""


def register_family(keyword: str, parser: FamilyParser) -> None:
    """Make ``keyword:<argument>`` specs build families with ``parser``."""
    if keyword in FAMILIES:
        raise ValueError(f"bar family {keyword!r} registered twice")
    FAMILIES[keyword] = parser
