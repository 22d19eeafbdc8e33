"""The ``session:<duration>`` and ``session:full`` families: time bars aligned to each
trading session's open in the venue's own time zone (:mod:`barsmith.bars.calendar`).

``session:1h`` gives bars of one hour from each session's open, the last one of a
session cut at its close (``short``); a bar never straddles a session boundary.
``session:full`` gives one bar per session. Bars carry the session's trading date
(that of its close, so an overnight session's evening start belongs to the next day's
date), stable across daylight-saving changes because sessions keep their local clock.

Options after the duration, comma-separated: ``fill=none`` (default: an interval
without messages has no bar), ``fill=empty`` (a bar with null prices and zero volume)
or ``fill=previous`` (a bar whose open, high, low and close are the previous bar's
close, zero volume); filled bars say so in ``filled``, and the columns are the same
whatever the policy. Fill applies inside sessions only.

Messages outside every session (and of symbols no calendar maps) are left out of the
spec's bars and counted (``sessions.outside = "drop"``, the default), or go to one bar
per gap between sessions with ``in_session`` false (``"bars"``; not with a fill
policy, whose specs always leave them out). They still update their books and other
specs' bars.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Final

from barsmith.bars.calendar import Calendars, Session, Venue
from barsmith.bars.columns import Column
from barsmith.bars.family import DECLINE, BarFamily, SpecContext, register_family
from barsmith.errors import BarSpecError, ConfigError
from barsmith.units import parse_duration_ns

if TYPE_CHECKING:
    from barsmith.bars.bar import OpenBar

COLUMNS: Final = (
    Column("trading_date", "string", True, "session bars: the session's trading date (of its close), YYYY-MM-DD"),
    Column("short", "bool", False, "session bars: cut short by the session's close"),
    Column("in_session", "bool", False, "session bars: false for a bar of messages between sessions"),
    Column("filled", "bool", False, "session bars: an interval without messages, given a bar by the fill policy"),
)
FILL_POLICIES: Final = ("none", "empty", "previous")


class SessionState:
    """A symbol's venue, the session it was last in, and its last close (for fill)."""

    __slots__ = ("last_close", "session", "venue")

    def __init__(self, venue: Venue | None) -> None:
        self.venue = venue
        self.session: Session | None = None
        self.last_close: float | None = None


class SessionFamily(BarFamily):
    """Bars of ``interval_ns`` from each session's open (0: the whole session)."""

    def __init__(self, interval_ns: int, fill: str, calendars: Calendars, outside: str) -> None:
        super().__init__("session", True, False, False, columns=COLUMNS, fills=fill != "none")
        self.interval_ns = interval_ns
        self.fill = fill
        self.calendars = calendars
        self.gap_bars = outside == "bars" and fill == "none"

    def new_state(self, symbol: str) -> Any:
        return SessionState(self.calendars.venue_of(symbol))

    def state_to_data(self, state: Any) -> Any:
        return [state.last_close]

    def state_from_data(self, symbol: str, data: Any) -> Any:
        state = SessionState(self.calendars.venue_of(symbol))
        state.last_close = data[0] if data else None
        return state

    def _session(self, state: SessionState, t: int) -> Session | None:
        cached = state.session
        if cached is not None and cached.open_ns <= t < cached.close_ns:
            return cached
        venue = state.venue
        found = venue.session_at(t) if venue is not None else None
        if found is not None:
            state.session = found
        return found

    def _interval(self, session: Session, t: int) -> tuple[int, int]:
        if self.interval_ns == 0:
            return session.open_ns, session.close_ns
        start = session.open_ns + (t - session.open_ns) // self.interval_ns * self.interval_ns
        return start, min(start + self.interval_ns, session.close_ns)

    def window(self, t: int, state: Any) -> tuple[int, int, int]:
        session = self._session(state, t)
        if session is not None:
            start, end = self._interval(session, t)
            return start, end, end
        venue = state.venue
        if not self.gap_bars or venue is None:
            return DECLINE, 0, 0
        # One bar for the gap between the session before and the one after.
        following = venue.next_session(t)
        before = venue.last_close_before(t)
        end = following.open_ns if following is not None else t + 1
        start = before if before is not None else t
        return start, end, end

    def next_window(self, end: int, state: Any) -> tuple[int, int] | None:
        venue = state.venue
        if venue is None:
            return None
        session = self._session(state, end)
        if session is None:
            session = venue.next_session(end)
            if session is None:
                return None
            state.session = session
            return self._interval(session, session.open_ns)
        return self._interval(session, end)

    def opened(self, bar: OpenBar, state: Any) -> None:
        session = self._session(state, bar.start)
        if session is None:
            bar.tag = [None, False, False]
            return
        full = self.interval_ns if self.interval_ns else session.close_ns - session.open_ns
        bar.tag = [session.trading_date, bar.end - bar.start < full, True]

    def emit(self, row: list[Any], bar: OpenBar, state: Any, index: dict[str, int]) -> None:
        at = index["trading_date"]
        trading_date, short, in_session = bar.tag
        filled = in_session and bar.messages == 0 and self.fill != "none"
        row[at], row[at + 1], row[at + 2], row[at + 3] = trading_date, short, in_session, filled
        close_at = index["close"]
        if filled and self.fill == "previous" and state.last_close is not None:
            for name in ("open", "high", "low", "close"):
                row[index[name]] = state.last_close
        elif row[close_at] is not None:
            state.last_close = row[close_at]


def parse_session(text: str, arg: str, context: SpecContext) -> BarFamily:
    parts = [part.strip() for part in arg.split(",")]
    size, options = parts[0], parts[1:]
    fill = "none"
    for option in options:
        key, eq, value = option.partition("=")
        if key != "fill" or not eq or value not in FILL_POLICIES:
            raise BarSpecError(f"bad bar spec {text!r}: option {option!r}; expected fill={'|'.join(FILL_POLICIES)}")
        fill = value
    if size == "full":
        interval = 0
    else:
        try:
            interval = parse_duration_ns(size)
        except ConfigError as exc:
            raise BarSpecError(f"bad bar spec {text!r}: {exc} (or 'full': one bar per session)") from None
    if context.calendars is None:
        raise BarSpecError(f"bad bar spec {text!r}: session bars need a calendar file (sessions.calendars_file)")
    return SessionFamily(interval, fill, context.calendars, context.outside)


register_family("session", parse_session, COLUMNS)
