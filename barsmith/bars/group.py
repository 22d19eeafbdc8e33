"""Statistic groups: the columns a bar carries beyond its frame, and how they accumulate.

A :class:`StatGroup` is one accumulator with fixed hooks and its own columns. Per bar
the engine creates one :class:`Accumulator` of each group its spec carries, and calls
only the hooks the group asks for:

* ``trade(px, qty, sign, book)`` -- a trade of the bar (it happens before its
  message's quote changes): ``book`` is the book prevailing before the message, and
  ``sign`` the trade's Lee--Ready direction (+1 buy, -1 sell, 0 unsigned) when the
  group sets ``signs`` (else 0: the engine signs trades only for groups that ask);
* ``quote(bid_px, bid_qty, ask_px, ask_qty, book)`` -- for groups with ``on_quote``:
  a message of the bar changed the book from the top of book given (each ``None``
  where it was undefined: not live, or that field unset) to ``book``;
* ``opened(slot, value)`` / ``held(slot, value, since, until, start)`` -- for each
  quantity the group *tracks* (a :class:`Tracker`: a value derived from the book, such
  as the spread): the value in effect when the bar opened, and each value with the
  time span [since, until) it held (the engine calls ``held`` only when the value
  changes, and when the bar's window ends; ``start`` is the bar's start, for clipping);
* ``closing(book)`` -- the book as it stood after the bar's last message;
* ``emit(row, bar, empty_window)`` -- append the group's column values to the output
  row (``empty_window``: an event bar whose window has zero length);
* ``to_state()`` / ``restore(data)`` -- the accumulator as plain data, for checkpoints.

A group is registered under its name (:func:`register_group`); a bar set names the
groups it carries (README, "Bars"). A group with a setting (the realized variance's
sampling interval) answers ``configured(options)`` with a copy for those settings,
whose ``label`` names them (checkpoints compare labels). Adding a statistic is one module with its group,
its accumulator, its columns and its tests.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from mypy_extensions import mypyc_attr

from barsmith.bars.columns import Column
from barsmith.book.book import SymbolBook

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar


@mypyc_attr(allow_interpreted_subclasses=True)  # an extension point: may be subclassed outside barsmith
class Tracker:
    """A quantity derived from the book that groups weight by time (e.g. the spread).
    Trackers with the same ``name`` are one: the engine follows each once per symbol."""

    def __init__(self, name: str) -> None:
        self.name = name

    def value(self, book: SymbolBook) -> float | None:
        """The quantity for the book as it stands; None where it is undefined."""
        raise NotImplementedError


@mypyc_attr(allow_interpreted_subclasses=True)  # an extension point: may be subclassed outside barsmith
class Accumulator:
    """One bar's state for one group. Every hook is a no-op here; a group overrides
    what it needs and says so in its :class:`StatGroup` flags."""

    def trade(self, px: float, qty: float, sign: int, book: SymbolBook) -> None:
        return None

    def quote(
        self, bid_px: float | None, bid_qty: float | None, ask_px: float | None, ask_qty: float | None, book: SymbolBook
    ) -> None:
        return None

    def opened(self, slot: int, value: float | None) -> None:
        return None

    def held(self, slot: int, value: float | None, since: int, until: int, start: int) -> None:
        return None

    def closing(self, book: SymbolBook) -> None:
        return None

    def emit(self, row: list[Any], bar: OpenBar, empty_window: bool) -> None:
        raise NotImplementedError

    def to_state(self) -> list[Any]:
        raise NotImplementedError

    def restore(self, data: list[Any]) -> None:
        raise NotImplementedError


class StatOptions:
    """The settings statistic groups may read (the ``statistics`` settings)."""

    def __init__(self, rv_sample_ns: int = 1_000_000_000, depth_levels: int = 5) -> None:
        if rv_sample_ns <= 0 or depth_levels <= 0:
            raise ValueError("the realized-variance sampling interval and the depth levels must be positive")
        self.rv_sample_ns = rv_sample_ns
        self.depth_levels = depth_levels


@mypyc_attr(allow_interpreted_subclasses=True)  # an extension point: may be subclassed outside barsmith
class StatGroup:
    """A statistic group: its name, columns, the tracked quantities it weights by time,
    and which hooks its accumulators need."""

    def __init__(
        self,
        name: str,
        doc: str,
        columns: tuple[Column, ...],
        trackers: tuple[Tracker, ...] = (),
        on_trade: bool = False,
        on_closing_book: bool = False,
        signs: bool = False,
        on_quote: bool = False,
    ) -> None:
        self.name = name
        self.label = name  # the name and any settings (see configured)
        self.doc = doc
        self.columns = columns
        self.trackers = trackers
        self.on_trade = on_trade or signs
        self.on_closing_book = on_closing_book
        self.signs = signs
        self.on_quote = on_quote

    def accumulator(self) -> Accumulator:
        raise NotImplementedError

    def configured(self, options: StatOptions) -> StatGroup:
        """The group for these settings (itself, for a group without settings)."""
        return self


GROUPS: dict[str, StatGroup] = {}
"""Every known group by name (filled by :func:`register_group`)."""


def register_group(group: StatGroup) -> StatGroup:
    """Make ``group`` available to bar sets under its name."""
    if not group.name or group.name in GROUPS:
        raise ValueError(f"statistic group {group.name!r} is unnamed or registered twice")
    GROUPS[group.name] = group
    return group
