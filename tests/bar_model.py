"""A deliberately naive model of barsmith's bars, for checking the engine against.

It shares no code with the engine. Per symbol it applies the README's book rules
message by message and keeps the *whole timeline* of book states; then it derives
every column of every bar straight from the README's definitions over that timeline
("Book rules", "Bars", the column table and "Spread statistics"). It is slow on
purpose: spread statistics integrate the timeline segment by segment, and nothing is
incremental, so an error in the engine's bookkeeping cannot be repeated here.

Input: a list of events, each ``("tick", record)`` (a wire map, or a list of them for
a batched record) or ``("close", limit_ns)`` (the idle rule's ``close_through``).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Any

RTOL = 1e-9  # README: volume and notional thresholds compare with a relative tolerance of 1e-9

_QUOTE_KEYS = ("bid_px", "bid_qty", "ask_px", "ask_qty")


@dataclass
class Accepted:
    """One accepted message, with the book as it stood right after it."""

    sym: str
    ts: int  # event time after the clamp
    gap: bool
    trade: tuple[float, float] | None
    live: bool
    bid: float | None
    ask: float | None
    late_for: set[str]
    position: int

    @property
    def spread(self) -> float | None:
        if self.live and self.bid is not None and self.ask is not None:
            return self.ask - self.bid
        return None

    @property
    def closing_book(self) -> tuple[float | None, float | None, float | None]:
        if not self.live:
            return None, None, None
        return self.bid, self.ask, self.spread


@dataclass
class ModelRun:
    accepted: list[Accepted] = field(default_factory=list)
    duplicates: int = 0
    rejected: int = 0
    watermark: int = 0
    closed_through: int = -1  # before the end of input


def valid(rec: Any) -> bool:
    """The wire format, just enough for the generated feeds (which are valid or plainly not)."""
    if type(rec) is not dict:
        return False
    if type(rec.get("sym")) is not str or type(rec.get("ts")) is not int or type(rec.get("seq")) is not int:
        return False
    if rec["ts"] <= 0 or rec["seq"] < 0 or rec.get("kind") not in ("delta", "snapshot"):
        return False
    return ("trade_px" in rec) == ("trade_qty" in rec)


def run_model(events: list[tuple[str, Any]], specs: list[tuple[str, str, float]], lateness_ns: int) -> ModelRun:
    """Apply the book rules to every message; ``specs`` as (text, kind, size)."""
    out = ModelRun()
    books: dict[str, dict[str, Any]] = {}
    time_specs = [(text, int(size)) for text, kind, size in specs if kind == "time"]
    # README, "Event time": a stream's first tick waits for a second one to confirm
    # its time (the generated feeds never jump by the guard's limit, so that is all the
    # guard does to them). It then counts as arriving with the second.
    waiting: list[tuple[Any, int]] = []
    started = False
    position = 0
    for what, value in events:
        if what == "close":
            out.closed_through = max(out.closed_through, value)
            continue
        for rec in value if type(value) is list else [value]:
            if not valid(rec):
                out.rejected += 1
                continue
            waiting.append((rec, position))
            if started or len(waiting) == 2:
                started = True
                for held, at in waiting:
                    _apply(out, books, time_specs, lateness_ns, held, at)
                waiting = []
        position += 1
    for held, at in waiting:
        _apply(out, books, time_specs, lateness_ns, held, at)
    return out


def _apply(  # the book rules for one message
    out: ModelRun,
    books: dict[str, dict[str, Any]],
    time_specs: list[tuple[str, int]],
    lateness_ns: int,
    rec: dict[str, Any],
    position: int,
) -> None:
    sym, seq, snapshot = rec["sym"], rec["seq"], rec["kind"] == "snapshot"
    book = books.setdefault(sym, {"last": None, "last_ts": 0, "live": False, "bid_px": None, "ask_px": None})
    last = book["last"]
    gap = False
    if not snapshot and last is not None:
        if seq <= last:
            out.duplicates += 1
            return
        gap = seq > last + 1
    book["last"] = seq
    ts = max(rec["ts"], book["last_ts"])
    book["last_ts"] = ts
    out.watermark = max(out.watermark, ts)
    out.closed_through = max(out.closed_through, ts - lateness_ns)
    trade = None
    if not snapshot and "trade_px" in rec:
        trade = (float(rec["trade_px"]), float(rec["trade_qty"]))
    if snapshot:
        book["live"] = True
        for key in _QUOTE_KEYS:
            book[key] = rec.get(key)
    elif gap:
        book["live"] = False
    elif book["live"]:
        for key in _QUOTE_KEYS:
            if key in rec:
                book[key] = rec[key]
    late = {text for text, size in time_specs if (ts // size + 1) * size <= out.closed_through}
    bid = None if book["bid_px"] is None else float(book["bid_px"])
    ask = None if book["ask_px"] is None else float(book["ask_px"])
    out.accepted.append(Accepted(sym, ts, gap, trade, book["live"], bid, ask, late, position))


def spread_at(timeline: list[Accepted], instant: int) -> float | None:
    """The spread in effect at ``instant``: after the last message at or before it."""
    current = None
    for msg in timeline:
        if msg.ts <= instant:
            current = msg.spread
    return current


def spread_stats(timeline: list[Accepted], begin: int, until: int) -> tuple[float | None, float | None, float | None]:
    """Time-weighted mean, min and max of the spread over [begin, until): undefined
    periods and states that held for no time are left out."""
    cuts = sorted({begin, until, *(m.ts for m in timeline if begin < m.ts < until)})
    area = 0.0
    held = 0
    values: list[float] = []
    for left, right in itertools.pairwise(cuts):
        value = spread_at(timeline, left)
        if value is None or right <= left:
            continue
        area += value * (right - left)
        held += right - left
        values.append(value)
    if held == 0:
        return None, None, None
    return area / held, min(values), max(values)


def _trade_columns(messages: list[Accepted]) -> dict[str, Any]:
    prices = [m.trade[0] for m in messages if m.trade is not None]
    volume = 0.0
    notional = 0.0
    for m in messages:
        if m.trade is not None:
            volume += m.trade[1]
            notional += m.trade[0] * m.trade[1]
    return {
        "open": prices[0] if prices else None,
        "high": max(prices) if prices else None,
        "low": min(prices) if prices else None,
        "close": prices[-1] if prices else None,
        "volume": volume,
        "notional": notional,
        "vwap": notional / volume if volume > 0 else None,
        "trades": len(prices),
        "messages": len(messages),
        "gaps": sum(1 for m in messages if m.gap),
    }


def _row(sym: str, spec: str, start: int, end: int, messages: list[Accepted], book: Any) -> dict[str, Any]:
    bid, ask, spread = book
    return {
        "symbol": sym,
        "spec": spec,
        "start": start,
        "end": end,
        **_trade_columns(messages),
        "bid_close": bid,
        "ask_close": ask,
        "spread_close": spread,
    }


def time_bars(run: ModelRun, spec: str, interval: int) -> dict[str, list[dict[str, Any]]]:
    """Per symbol, one bar per interval holding a message that was not late for it."""
    out: dict[str, list[dict[str, Any]]] = {}
    for sym in sorted({m.sym for m in run.accepted}):
        timeline = [m for m in run.accepted if m.sym == sym]
        intervals = sorted({m.ts // interval for m in timeline if spec not in m.late_for})
        bars = []
        for k in intervals:
            start, end = k * interval, (k + 1) * interval
            inside = [m for m in timeline if m.ts // interval == k and spec not in m.late_for]
            complete = end <= run.closed_through
            until = end if complete else min(end, run.watermark)
            # A message late for this bar arrived after it closed: it is not part of it,
            # although its event time falls inside (earlier ones are the state carried in).
            known = [m for m in timeline if spec not in m.late_for or m.ts < start]
            row = _row(sym, spec, start, end, inside, inside[-1].closing_book)
            row["spread_mean"], row["spread_min"], row["spread_max"] = spread_stats(known, start, until)
            row["complete"] = complete
            bars.append(row)
        out[sym] = bars
    return out


def event_bars(run: ModelRun, spec: str, kind: str, size: float) -> dict[str, list[dict[str, Any]]]:
    """Per symbol, bars from a first trade to the trade that reaches the threshold."""
    out: dict[str, list[dict[str, Any]]] = {}
    for sym in sorted({m.sym for m in run.accepted}):
        timeline = [m for m in run.accepted if m.sym == sym]
        bars = []
        first = None  # index in timeline of the open bar's first trade message
        for i, msg in enumerate(timeline):
            if first is None:
                if msg.trade is None:
                    continue
                first = i
            if msg.trade is None:
                continue
            inside = timeline[first : i + 1]
            cols = _trade_columns(inside)
            reached = cols["trades"] >= size if kind == "trades" else cols[kind] >= size * (1.0 - RTOL)
            if reached:
                bars.append(_event_row(sym, spec, timeline, first, i, msg.ts, True))
                first = None
        if first is not None:
            bars.append(_event_row(sym, spec, timeline, first, len(timeline) - 1, run.watermark, False))
        out[sym] = bars
    return out


def _event_row(
    sym: str, spec: str, timeline: list[Accepted], first: int, last: int, until: int, complete: bool
) -> dict[str, Any]:
    inside = timeline[first : last + 1]
    trades = [m for m in inside if m.trade is not None]
    start, end = trades[0].ts, trades[-1].ts
    row = _row(sym, spec, start, end, inside, inside[-1].closing_book)
    if until > start:
        row["spread_mean"], row["spread_min"], row["spread_max"] = spread_stats(timeline, start, until)
    else:
        # A zero-length window: the spread in effect at the first trade, which happens
        # before its own message's quote changes.
        before = timeline[first - 1].spread if first > 0 else None
        row["spread_mean"] = row["spread_min"] = row["spread_max"] = before
    row["complete"] = complete
    return row


def model_bars(run: ModelRun, specs: list[tuple[str, str, float]]) -> dict[tuple[str, str], list[dict[str, Any]]]:
    """Every bar the model defines, keyed by (spec, symbol), in time order."""
    out: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for text, kind, size in specs:
        per_symbol = time_bars(run, text, int(size)) if kind == "time" else event_bars(run, text, kind, size)
        for sym, bars in per_symbol.items():
            if bars:
                out[(text, sym)] = bars
    return out


def same_value(a: Any, b: Any) -> bool:
    """Exact, except time-weighted means, which may differ in the last bits because the
    engine accumulates areas in other pieces."""
    if isinstance(a, float) and isinstance(b, float):
        return a == b or math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-12)
    return (a is None and b is None) or (type(a) is type(b) and bool(a == b))
