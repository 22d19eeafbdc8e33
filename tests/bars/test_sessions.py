"""Session-aligned bars on trading calendars (README, "Sessions"), each case by hand.

External facts, named beside their checks: the IANA time zone database through Python's
``zoneinfo`` (PEP 615); US daylight saving time from the second Sunday of March to the
first Sunday of November (Energy Policy Act of 2005), EU summer time from the last
Sunday of March to the last Sunday of October (Directive 2000/84/EC) -- the rules from
memory, the dates computed by zoneinfo.
"""

from __future__ import annotations

import random
from datetime import UTC, date, datetime
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from factories import trade

from barsmith.bars.calendar import Calendars, parse_calendars
from barsmith.bars.family import SpecContext
from barsmith.bars.record import Bar
from barsmith.bars.spec import parse_specs
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.ingest.eventtime import StreamLimits

H = 3_600_000_000_000
M = 60_000_000_000
# These feeds are sparse on purpose (a trade an hour or a day apart): without the
# event-time guard's wait for a second symbol to confirm each jump (tested elsewhere).
NO_JUMP_GUARD = StreamLimits(max_jump_ns=1_000 * 24 * H)

CALENDARS: dict[str, Any] = {
    "venue": {
        "NYC": {
            "timezone": "America/New_York",
            "sessions": [["09:30", "16:00"]],
            "holidays": ["2027-11-25"],
            "half_days": {"2027-11-26": "13:00"},
        },
        "LDN": {"timezone": "Europe/London", "sessions": [["09:00", "17:30"]]},
        "OVERNIGHT": {"timezone": "America/Chicago", "sessions": [["17:00", "16:00"]]},
        "ROUND": {
            "timezone": "America/New_York",
            "sessions": [["18:00", "18:00"]],
            "weekdays": ["mon", "tue", "wed", "thu", "fri", "sat", "sun"],
        },
        "LUNCH": {"timezone": "Asia/Tokyo", "sessions": [["09:00", "11:30"], ["12:30", "15:00"]]},
    },
    "symbols": {"AUREL.NYC": "NYC", "BRENT.LDN": "LDN", "CORD.ON": "OVERNIGHT", "DUNE.RND": "ROUND"},
    "patterns": [{"match": "*.TKY", "venue": "LUNCH"}],
}


def calendars() -> Calendars:
    return parse_calendars(CALENDARS)


def utc(y: int, mo: int, d: int, h: int = 0, mi: int = 0) -> int:
    return int(datetime(y, mo, d, h, mi, tzinfo=UTC).timestamp()) * 1_000_000_000


def local(ns: int, zone: str) -> str:
    return datetime.fromtimestamp(ns / 1e9, ZoneInfo(zone)).strftime("%H:%M%z")


def run(
    records: list[dict[str, Any]], spec: str, close_ns: int | None = None, outside: str = "drop"
) -> tuple[list[Bar], Engine]:
    specs = parse_specs([spec], context=SpecContext(calendars(), outside))
    engine = Engine(specs, 0, NO_JUMP_GUARD)
    engine.process(records, list(range(len(records))), "test")
    if close_ns is not None:
        engine.close_through(close_ns)
        bars = engine.take_bars()
    else:
        engine.finish()
        bars = engine.take_bars()
    return bars, engine


def trades(sym: str, times: list[int]) -> list[dict[str, Any]]:
    return [trade(sym, ts, i + 1, 10.0 + i, 1.0) for i, ts in enumerate(times)]


def test_a_new_york_0930_open_is_1430_utc_in_january_and_1330_in_july() -> None:
    # IANA tz via zoneinfo; US DST rules: Energy Policy Act of 2005 (from memory).
    nyc = calendars().venues["NYC"]
    assert nyc.sessions_of(date(2027, 1, 15))[0].open_ns == utc(2027, 1, 15, 14, 30)
    assert nyc.sessions_of(date(2027, 7, 15))[0].open_ns == utc(2027, 7, 15, 13, 30)


@pytest.mark.parametrize(
    ("day", "hours"),
    [
        (date(2027, 3, 10), 5),  # both on winter time
        (date(2027, 3, 17), 4),  # US changed on March 14, the EU changes on March 28
        (date(2027, 3, 31), 5),  # both on summer time
        (date(2027, 11, 3), 4),  # the EU changed back on October 31, the US does on November 7
        (date(2027, 11, 10), 5),
    ],
)
def test_between_the_us_and_eu_changes_new_york_is_four_hours_behind_london(day: date, hours: int) -> None:
    # US rules: Energy Policy Act of 2005; EU rules: Directive 2000/84/EC (from memory).
    venues = calendars().venues
    # Both open at their local 09:30 / 09:00: the UTC difference less the half hour.
    gap = venues["NYC"].sessions_of(day)[0].open_ns - venues["LDN"].sessions_of(day)[0].open_ns
    assert gap == hours * H + 30 * M


def test_a_six_and_a_half_hour_session_in_hourly_bars_ends_with_a_short_half_hour() -> None:
    day = [utc(2027, 1, 15, 14, 30) + k * 30 * M + M for k in range(13)]  # a trade every half hour
    bars, _ = run(trades("AUREL.NYC", day), "session:1h", close_ns=utc(2027, 1, 16))
    starts = [utc(2027, 1, 15, 14, 30) + k * H for k in range(7)]
    assert [(b.start, b.end, b.short, b.trading_date) for b in bars] == [
        (s, min(s + H, utc(2027, 1, 15, 21)), s == starts[-1], "2027-01-15") for s in starts
    ]
    assert [b.trades for b in bars] == [2, 2, 2, 2, 2, 2, 1]


def test_spring_forward_and_fall_back_days_have_23_and_25_hourly_bars() -> None:
    # A round-the-clock venue whose sessions run 18:00 to 18:00 New York time. US DST
    # began 2027-03-14 02:00 and ends 2027-11-07 02:00 (Energy Policy Act of 2005, from memory).
    for day, hours in ((date(2027, 3, 14), 23), (date(2027, 11, 7), 25)):
        (session,) = calendars().venues["ROUND"].sessions_of(day)
        assert session.close_ns - session.open_ns == hours * H
        times = list(range(session.open_ns + M, session.close_ns, 20 * M))
        bars, _ = run(trades("DUNE.RND", times), "session:1h", close_ns=session.close_ns)
        assert len(bars) == hours and not any(b.short for b in bars)
        assert {b.trading_date for b in bars} == {day.isoformat()}
        labels = [local(b.start, "America/New_York") for b in bars]
        if hours == 23:  # 01:00 EST is followed by 03:00 EDT: the 02:00 hour does not exist
            assert labels[6:9] == ["00:00-0500", "01:00-0500", "03:00-0400"]
        else:  # the 01:00 hour happens twice, first on summer time, then on winter time
            assert labels[6:9] == ["00:00-0400", "01:00-0400", "01:00-0500"]


def test_an_overnight_session_keeps_its_local_open_across_a_dst_change() -> None:
    # Chicago 17:00 open of the previous calendar day: 23:00 UTC on winter time, 22:00 UTC
    # once US DST began on 2027-03-14 (Energy Policy Act of 2005, from memory).
    venue = calendars().venues["OVERNIGHT"]
    monday_before, monday_after = venue.sessions_of(date(2027, 3, 8))[0], venue.sessions_of(date(2027, 3, 15))[0]
    assert monday_before.open_ns == utc(2027, 3, 7, 23) and monday_after.open_ns == utc(2027, 3, 14, 22)
    # A trade on Sunday evening belongs to Monday's trading date (the date of its close).
    times = [utc(2027, 3, 14, 22, 30), utc(2027, 3, 15, 20), utc(2027, 3, 15, 22, 30)]
    bars, _ = run(trades("CORD.ON", times), "session:full", close_ns=utc(2027, 3, 17))
    assert [(b.start, b.end, b.trading_date, b.trades) for b in bars] == [
        (utc(2027, 3, 14, 22), utc(2027, 3, 15, 21), "2027-03-15", 2),
        (utc(2027, 3, 15, 22), utc(2027, 3, 16, 21), "2027-03-16", 1),
    ]


def test_holidays_have_no_session_and_half_days_close_early() -> None:
    times = [utc(2027, 11, 25, 15), utc(2027, 11, 26, 14, 45), utc(2027, 11, 26, 17, 45), utc(2027, 11, 26, 18, 30)]
    bars, engine = run(trades("AUREL.NYC", times), "session:1h", close_ns=utc(2027, 11, 27))
    # Thanksgiving-style holiday: the first trade is outside; the half day closes at
    # 13:00 New York time (18:00 UTC), so its fourth bar is half an hour, and the last
    # trade is outside too.
    assert [(b.start, b.end, b.short) for b in bars] == [
        (utc(2027, 11, 26, 14, 30), utc(2027, 11, 26, 15, 30), False),
        (utc(2027, 11, 26, 17, 30), utc(2027, 11, 26, 18), True),
    ]
    assert engine.stats.outside == {"session:1h": 2}


def test_a_lunch_break_splits_the_day_into_two_sessions() -> None:
    # Tokyo has no daylight saving time: sessions 00:00-02:30 and 03:30-06:00 UTC.
    times = [utc(2027, 4, 5, h, m) for h, m in ((0, 10), (2, 10), (3, 0), (3, 40), (5, 50))]
    bars, engine = run(trades("GLINT.TKY", times), "session:1h", close_ns=utc(2027, 4, 6))
    assert [(b.start, b.end, b.short) for b in bars] == [
        (utc(2027, 4, 5, 0), utc(2027, 4, 5, 1), False),
        (utc(2027, 4, 5, 2), utc(2027, 4, 5, 2, 30), True),
        (utc(2027, 4, 5, 3, 30), utc(2027, 4, 5, 4, 30), False),
        (utc(2027, 4, 5, 5, 30), utc(2027, 4, 5, 6), True),
    ]
    assert engine.stats.outside == {"session:1h": 1}  # the 03:00 trade, in the break
    full, _ = run(trades("GLINT.TKY", times), "session:full", close_ns=utc(2027, 4, 6))
    assert [(b.trading_date, b.trades) for b in full] == [("2027-04-05", 2), ("2027-04-05", 2)]


def test_messages_between_sessions_can_get_bars_of_their_own() -> None:
    times = [utc(2027, 1, 15, 20), utc(2027, 1, 15, 22), utc(2027, 1, 18, 12), utc(2027, 1, 18, 15)]
    bars, _ = run(trades("AUREL.NYC", times), "session:full", close_ns=utc(2027, 1, 19), outside="bars")
    # Friday's session, the weekend gap (Friday's close to Monday's open), Monday's session.
    assert [(b.start, b.end, b.in_session, b.trading_date, b.trades) for b in bars] == [
        (utc(2027, 1, 15, 14, 30), utc(2027, 1, 15, 21), True, "2027-01-15", 1),
        (utc(2027, 1, 15, 21), utc(2027, 1, 18, 14, 30), False, None, 2),
        (utc(2027, 1, 18, 14, 30), utc(2027, 1, 18, 21), True, "2027-01-18", 1),
    ]


def test_a_symbol_without_a_venue_is_left_out_and_counted() -> None:
    bars, engine = run(trades("NOWHERE.XX", [utc(2027, 1, 15, 15)]), "session:1h")
    assert bars == [] and engine.stats.outside == {"session:1h": 1}


@pytest.mark.parametrize("policy", ["none", "empty", "previous"])
def test_empty_intervals_follow_the_fill_policy_with_the_same_columns(policy: str) -> None:
    times = [utc(2027, 1, 15, 14, 35), utc(2027, 1, 15, 17, 10)]
    spec = f"session:1h,fill={policy}"
    bars, _ = run(trades("AUREL.NYC", times), spec, close_ns=utc(2027, 1, 15, 21))
    (plain,) = parse_specs(["session:1h"], context=SpecContext(calendars()))
    assert all(list(b.names) == [c.name for c in plain.columns] for b in bars)  # whatever the policy
    rows = [(b.start, b.filled, b.trades, b.volume, b.open, b.close) for b in bars]
    s = utc(2027, 1, 15, 14, 30)
    traded = {s: (10.0, 10.0), s + 2 * H: (11.0, 11.0)}
    if policy == "none":
        assert rows == [(s, False, 1, 1.0, 10.0, 10.0), (s + 2 * H, False, 1, 1.0, 11.0, 11.0)]
        return
    assert [r[0] for r in rows] == [s + k * H for k in range(7)]
    for start, filled, count, volume, first, last in rows:
        if start in traded:
            assert (filled, count, (first, last)) == (False, 1, traded[start])
            continue
        previous = 10.0 if start < s + 2 * H else 11.0
        expect = (previous, previous) if policy == "previous" else (None, None)
        assert (filled, count, volume, (first, last)) == (True, 0, 0.0, expect)


def test_fill_continues_into_the_next_session_and_survives_a_checkpoint() -> None:
    specs = parse_specs(["session:1h,fill=previous"], context=SpecContext(calendars()))
    rng = random.Random(5)
    times = sorted(utc(2027, 1, 18, 14, 30) + rng.randrange(3 * 24 * H) for _ in range(40))
    recs = trades("AUREL.NYC", times)
    whole = Engine(specs, 0, NO_JUMP_GUARD)
    whole.process(recs, list(range(len(recs))), "t")
    whole.close_through(utc(2027, 1, 21, 21))
    expected = whole.take_bars()
    # Every in-session hour of Monday to Thursday (7 per day), traded or filled.
    assert len(expected) == 28 and all(b.in_session for b in expected)
    for cut in (0, 5, 17, 39):
        first = Engine(specs, 0, NO_JUMP_GUARD)
        first.process(recs[:cut], list(range(cut)), "t")
        got = first.take_bars()
        first.take_rejects()
        second, _ = decode_checkpoint(encode_checkpoint(first), specs, 0, NO_JUMP_GUARD)
        second.process(recs[cut:], list(range(cut, len(recs))), "t")
        second.close_through(utc(2027, 1, 21, 21))
        assert got + second.take_bars() == expected, cut


def test_replay_reads_the_calendar_file_from_the_settings(tmp_path: Any, feed_file: Any) -> None:
    from pathlib import Path

    import pandas as pd

    from barsmith.cli import main

    root = Path(__file__).resolve().parents[2]
    config = tmp_path / "barsmith.toml"
    config.write_text(f'[sessions]\ncalendars_file = "{root / "config" / "calendars.example.toml"}"\n')
    times = [utc(2027, 1, 15, 14, 30) + k * 20 * M for k in range(20)]
    feed = sorted(trades("FENWORTH~KESMOOR", times) + trades("CORVESTRA~KESMOOR", times), key=lambda rec: rec["ts"])
    path = feed_file(feed)
    out = tmp_path / "out"
    args = ["replay", "--quiet", str(path), "--config", str(config), "--bars", "session:30m", "--out", str(out)]
    assert main(args) == 0
    frame = pd.read_parquet(out)
    # FENWORTH trades at KESTRELMOOR (New York: 09:30 is 14:30 UTC in January); CORVESTRA
    # at ASHBRIDGE, whose overnight session runs 17:00-16:00 Chicago time (23:00-22:00 UTC).
    mine = frame[frame["symbol"] == "FENWORTH~KESMOOR"]
    starts = [utc(2027, 1, 15, 14, 30) + k * 30 * M for k in range(13)]
    assert sorted(stamp.value for stamp in mine["start"]) == starts
    # ASHBRIDGE's half hours from 23:00 UTC fall on the same marks here.
    theirs = frame[frame["symbol"] == "CORVESTRA~KESMOOR"]
    assert sorted(stamp.value for stamp in theirs["start"]) == starts
    assert set(frame["trading_date"]) == {"2027-01-15"}


def test_a_bad_calendar_file_is_one_clear_error(tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    from barsmith.cli import main

    bad = tmp_path / "calendars.toml"
    bad.write_text('[venue.X]\ntimezone = "Mars/Olympus"\nsessions = [["09:00", "17:00"]]\n')
    config = tmp_path / "barsmith.toml"
    config.write_text(f'[sessions]\ncalendars_file = "{bad}"\n')
    assert main(["config", "check", str(config)]) == 2  # the calendars are checked with the settings
    assert "not an IANA time zone" in capsys.readouterr().err
    args = [
        "replay",
        "--quiet",
        str(bad),
        "--config",
        str(config),
        "--bars",
        "session:1h",
        "--out",
        str(tmp_path / "o"),
    ]
    code = main(args)
    err = capsys.readouterr().err
    assert code == 2 and "Mars/Olympus" in err and "not an IANA time zone" in err and "\n" not in err.strip()


def test_session_bars_match_pandas_resample_in_local_time() -> None:
    # pandas (a general-purpose reference library): resample("1h", offset="30min") on New
    # York local time gives half-past bins, [start, end) labelled by their start; inside a
    # 09:30-16:00 session they are barsmith's session:1h bars, across the US DST change
    # of 2027-03-14 too. pandas' last bin of a day runs to 16:30, barsmith's ends at 16:00.
    import pandas as pd

    rng = random.Random(11)
    times = []
    for day in (date(2027, 3, 11), date(2027, 3, 12), date(2027, 3, 15), date(2027, 3, 16)):
        (session,) = calendars().venues["NYC"].sessions_of(day)
        times += sorted(rng.randrange(session.open_ns, session.close_ns) for _ in range(60))
    recs = [
        trade("AUREL.NYC", ts, i + 1, round(rng.uniform(9, 11), 2), float(rng.randint(1, 9)))
        for i, ts in enumerate(times)
    ]
    bars, _ = run(recs, "session:1h")
    ours = pd.DataFrame([b.as_dict() for b in bars]).set_index("start")

    frame = pd.DataFrame(recs)
    frame["time"] = pd.to_datetime(frame["ts"], unit="ns", utc=True).dt.tz_convert("America/New_York")
    px = frame.set_index("time")["trade_px"]
    ref = px.resample("1h", offset="30min").ohlc()
    ref["volume"] = frame.set_index("time")["trade_qty"].resample("1h", offset="30min").sum()
    ref = ref.dropna()
    assert [stamp.value for stamp in ref.index] == list(ours.index)
    for column in ("open", "high", "low", "close", "volume"):
        assert list(ours[column]) == list(ref[column]), column
    assert [stamp.strftime("%H:%M") for stamp in ref.index[:7]] == [f"{h:02d}:30" for h in range(9, 16)]
