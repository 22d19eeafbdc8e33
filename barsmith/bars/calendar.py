"""Trading calendars: when each venue is open, in its own time zone.

A calendar file (TOML, barsmith's own format; see ``config/calendars.example.toml``)
names venues and says which symbols trade where::

    [venue.HALVERNMOOR]
    timezone = "America/New_York"          # an IANA zone (through zoneinfo)
    sessions = [["09:30", "16:00"]]        # local open and close; several a day allowed
    weekdays = ["mon", "tue", "wed", "thu", "fri"]   # trading dates
    holidays = ["2027-01-01"]              # trading dates without sessions
    half_days = { "2027-11-26" = "13:00" } # trading dates closing early

    [symbols]                              # exact symbols first ...
    "FENWORTH~KESMOOR" = "HALVERNMOOR"
    [[patterns]]                           # ... then shell-style patterns, in order
    match = "*~KESMOOR"
    venue = "HALVERNMOOR"

A session whose close is not after its open opens on the *previous* calendar day (an
evening open running into the next day); a session belongs to the **trading date** of
its close. A half day's close cuts the session that contains it and drops the ones
after. Local times are converted to UTC per date with the zone's rules, so a session
keeps its local clock across daylight-saving changes; a local time that does not
exist on a spring-forward day takes the offset from before the change (02:30 becomes
03:30), one that happens twice on a fall-back day is its first occurrence (PEP 495,
``fold=0``).
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final

from barsmith.errors import ConfigError

if TYPE_CHECKING:
    from zoneinfo import ZoneInfo

WEEKDAYS: Final = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
# The TOML reader and the zone database load with the first calendar file: every spec
# parse imports this module, most runs have no calendars.
_EPOCH: Final = datetime(1970, 1, 1, tzinfo=UTC)


@dataclass(frozen=True, slots=True)
class Session:
    """One session, in UTC ns, and the trading date it belongs to (ISO ``YYYY-MM-DD``)."""

    open_ns: int
    close_ns: int
    trading_date: str


@dataclass(slots=True)
class Venue:
    """A venue's zone and rules, with the sessions of each trading date cached."""

    name: str
    zone: ZoneInfo
    sessions: tuple[tuple[time, time], ...]
    weekdays: frozenset[int]
    holidays: frozenset[date]
    half_days: dict[date, time]
    _by_date: dict[date, tuple[Session, ...]] = field(default_factory=dict)

    def sessions_of(self, day: date) -> tuple[Session, ...]:
        """The sessions of trading date ``day`` (none on weekends and holidays)."""
        cached = self._by_date.get(day)
        if cached is None:
            cached = self._by_date[day] = self._compute(day)
            if len(self._by_date) > 4096:  # bounded: a stream moves forward through dates
                self._by_date.pop(next(iter(self._by_date)))
        return cached

    def _compute(self, day: date) -> tuple[Session, ...]:
        if day.weekday() not in self.weekdays or day in self.holidays:
            return ()
        early = self.half_days.get(day)
        out: list[Session] = []
        for open_at, close_at in self.sessions:
            open_day = day - timedelta(days=1) if close_at <= open_at else day
            open_ns, close_ns = self._utc_ns(open_day, open_at), self._utc_ns(day, close_at)
            if early is not None:
                early_ns = self._utc_ns(day, early)
                if open_ns >= early_ns:
                    continue
                close_ns = min(close_ns, early_ns)
            out.append(Session(open_ns, close_ns, day.isoformat()))
        return tuple(out)

    def _utc_ns(self, day: date, at: time) -> int:
        # fold=0 (PEP 495): a repeated hour's first occurrence; a wall time in a
        # spring-forward gap takes the offset from before it (02:30 becomes 03:30).
        delta = datetime.combine(day, at, tzinfo=self.zone) - _EPOCH
        return (delta.days * 86_400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1_000

    def session_at(self, t_ns: int) -> Session | None:
        """The session containing ``t_ns`` (open <= t < close), or None."""
        for candidate in self._around(t_ns):
            if candidate.open_ns <= t_ns < candidate.close_ns:
                return candidate
        return None

    def next_session(self, t_ns: int) -> Session | None:
        """The first session that opens at or after ``t_ns`` (within a year), or None."""
        day = self._local_date(t_ns) - timedelta(days=1)
        for _ in range(370):
            for candidate in self.sessions_of(day):
                if candidate.open_ns >= t_ns:
                    return candidate
            day += timedelta(days=1)
        return None

    def last_close_before(self, t_ns: int) -> int | None:
        """The latest session close at or before ``t_ns`` (within a year), or None."""
        day = self._local_date(t_ns) + timedelta(days=1)
        for _ in range(370):
            closes = [s.close_ns for s in self.sessions_of(day) if s.close_ns <= t_ns]
            if closes:
                return max(closes)
            day -= timedelta(days=1)
        return None

    def _around(self, t_ns: int) -> list[Session]:
        day = self._local_date(t_ns)
        # An overnight session of tomorrow's trading date may already be open.
        return [*self.sessions_of(day), *self.sessions_of(day + timedelta(days=1))]

    def _local_date(self, t_ns: int) -> date:
        return (_EPOCH + timedelta(microseconds=t_ns // 1_000)).astimezone(self.zone).date()


@dataclass(slots=True)
class Calendars:
    """Every venue of a calendar file, and which symbols trade where."""

    venues: dict[str, Venue]
    symbols: dict[str, str]
    patterns: list[tuple[str, str]]
    source: str = ""

    def venue_of(self, symbol: str) -> Venue | None:
        """The symbol's venue: the exact table first, then the patterns in order."""
        name = self.symbols.get(symbol)
        if name is None:
            for pattern, venue in self.patterns:
                if fnmatch.fnmatchcase(symbol, pattern):
                    name = venue
                    break
        return self.venues.get(name) if name is not None else None


def load_calendars(path: str | Path) -> Calendars:
    """Read a calendar file; raises :class:`ConfigError` naming every problem."""
    import tomllib

    source = Path(path)
    try:
        data = tomllib.loads(source.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"calendar file not found: {source}") from None
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"cannot read calendar file {source}: {exc}") from None
    return parse_calendars(data, str(source))


def parse_calendars(data: dict[str, Any], source: str = "calendars") -> Calendars:
    """Calendars from decoded TOML (see the module docstring for the format)."""
    problems: list[str] = []
    venues: dict[str, Venue] = {}
    for name, spec in (data.get("venue") or {}).items():
        try:
            venues[name] = _venue(name, spec)
        except (ConfigError, ValueError, TypeError, KeyError) as exc:
            problems.append(f"venue {name}: {exc}")
    unknown = set(data) - {"venue", "symbols", "patterns"}
    if unknown:
        problems.append(f"unknown table(s) {', '.join(sorted(unknown))} (expected venue, symbols, patterns)")
    symbols = {str(k): str(v) for k, v in (data.get("symbols") or {}).items()}
    patterns = [(str(p.get("match", "")), str(p.get("venue", ""))) for p in (data.get("patterns") or [])]
    for symbol, venue in [*symbols.items(), *((p, v) for p, v in patterns)]:
        if venue not in venues:
            problems.append(f"{symbol!r} maps to venue {venue!r}, which the file does not define")
    if not venues:
        problems.append("no [venue.NAME] table")
    if problems:
        raise ConfigError(f"{source}: " + "; ".join(problems))
    return Calendars(venues, symbols, patterns, source)


def _venue(name: str, spec: dict[str, Any]) -> Venue:
    extra = set(spec) - {"timezone", "sessions", "weekdays", "holidays", "half_days"}
    if extra:
        raise ConfigError(f"unknown key(s) {', '.join(sorted(extra))}")
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        zone = ZoneInfo(str(spec["timezone"]))
    except (ZoneInfoNotFoundError, ValueError, KeyError):
        raise ConfigError(f"timezone {spec.get('timezone')!r} is not an IANA time zone") from None
    sessions = tuple((_clock(pair[0]), _clock(pair[1])) for pair in spec.get("sessions", []))
    if not sessions:
        raise ConfigError("sessions: give at least one [open, close] pair")
    names = [str(d).lower()[:3] for d in spec.get("weekdays", WEEKDAYS[:5])]
    bad = [d for d in names if d not in WEEKDAYS]
    if bad:
        raise ConfigError(f"weekdays: {bad[0]!r} is not one of {', '.join(WEEKDAYS)}")
    holidays = frozenset(date.fromisoformat(str(d)) for d in spec.get("holidays", []))
    half_days = {date.fromisoformat(str(d)): _clock(c) for d, c in (spec.get("half_days") or {}).items()}
    return Venue(name, zone, sessions, frozenset(WEEKDAYS.index(d) for d in names), holidays, half_days)


def _clock(text: Any) -> time:
    try:
        hours, minutes = str(text).split(":")
        return time(int(hours), int(minutes))
    except ValueError:
        raise ConfigError(f"{text!r} is not a local time HH:MM") from None
