"""The bar engine: validated ticks → per-symbol books → bar accumulators → finished bars.

One :class:`Engine` owns one ordered stream (a replayed file set, or one Kafka
partition). It is synchronous and does no I/O: a runner feeds it decoded records
with :meth:`Engine.process` and drains :meth:`Engine.take_bars` and
:meth:`Engine.take_rejects` into sinks. Replay and the live service use it alike.

Per message, in this order (the order matters and tests pin it):

0. validate (malformed → reject); the event-time guards: a ``ts`` too far ahead of the
   wall clock (the service) is rejected as ``future``; one too far ahead of the
   stream's own progress is *held* until the jump is confirmed or contradicted (see
   :mod:`barsmith.ingest.eventtime`) -- before it touches any book or the watermark;
1. the book judges the message by the sequence rules (duplicate → dropped; too far
   behind its symbol's time → ``backdated``) and clamps its event time -- without
   changing the book yet;
2. advance the watermark (largest accepted ``ts``) and close the time bars whose end
   is at or before ``watermark - lateness``;
3. seal the symbol's time bars that this message moves past; then the message's
   trade, into the time bar of its interval and the event bars (a message whose time
   interval is already closed is *late* for that time bar: recorded as a reject with
   reason ``late``, still used for books and event bars);
4. the message's effect on the book: its status change (gap, snapshot) and quote
   changes (a trade happens before its message's quote changes);
5. event bars that reached their threshold close with the book as it now stands.

Steps 2 and 3 run before step 4 on purpose: a bar closed there ends before this
message, so it takes the book as it stood after the bar's own last message. A gap
or a snapshot opening the next interval belongs to the next bar.
"""

from __future__ import annotations

import heapq
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, Final

from barsmith.bars.bar import BarLayout, OpenBar
from barsmith.bars.family import DECLINE
from barsmith.bars.group import Tracker
from barsmith.bars.record import Bar
from barsmith.bars.spec import BarSpec
from barsmith.book.book import Outcome, SymbolBook
from barsmith.errors import StateError
from barsmith.ingest.eventtime import UNCONFIRMED, ClockGuard, HeldTick, StreamLimits
from barsmith.ingest.rejects import Reject, pack_record
from barsmith.ingest.ticks import MalformedTickError, RejectReason, Tick, decode_tick
from barsmith.units import format_duration_ns

_DUPLICATE: Final = Outcome.DUPLICATE
_GAP: Final = Outcome.GAP
_BACKDATED: Final = Outcome.BACKDATED
_NO_CLOSE: Final = 2**63  # "no time bar is due" (above any int64 timestamp)
_MAX_TS: Final = 2**63 - 1


@dataclass(slots=True)
class EngineStats:
    """Counters of one engine (or, summed with :meth:`add`, of a whole run)."""

    records: int = 0  # messages read: every tick candidate, valid or not
    accepted: int = 0
    duplicates: int = 0
    gaps: int = 0
    late: int = 0
    time_regressions: int = 0
    rejected: Counter[str] = field(default_factory=Counter)  # by reason (not counting late)
    bars: Counter[str] = field(default_factory=Counter)  # by spec text
    outside: Counter[str] = field(default_factory=Counter)  # messages a spec's sessions left out, by spec
    revisions: int = 0  # publications of a bar again, corrected by a straggler

    def add(self, other: EngineStats) -> None:
        self.records += other.records
        self.accepted += other.accepted
        self.duplicates += other.duplicates
        self.gaps += other.gaps
        self.late += other.late
        self.time_regressions += other.time_regressions
        self.rejected.update(other.rejected)
        self.bars.update(other.bars)
        self.outside.update(other.outside)
        self.revisions += other.revisions

    def since(self, earlier: EngineStats) -> EngineStats:
        """The counts added after ``earlier`` (a copy of these counters taken before)."""
        out = EngineStats(
            self.records - earlier.records,
            self.accepted - earlier.accepted,
            self.duplicates - earlier.duplicates,
            self.gaps - earlier.gaps,
            self.late - earlier.late,
            self.time_regressions - earlier.time_regressions,
        )
        out.rejected = self.rejected - earlier.rejected
        out.bars = self.bars - earlier.bars
        out.outside = self.outside - earlier.outside
        out.revisions = self.revisions - earlier.revisions
        return out

    def copy(self) -> EngineStats:
        out = EngineStats()
        out.add(self)
        return out


class _SymbolState:
    """A symbol's book, its open bar per spec, each tracked quantity in effect since
    when, and each family's per-symbol state."""

    __slots__ = ("bars", "book", "family_states", "since", "tracked")

    def __init__(self, symbol: str, n_specs: int, n_trackers: int, family_states: list[Any]) -> None:
        self.book = SymbolBook(symbol)
        self.bars: list[OpenBar | None] = [None] * n_specs
        self.tracked: list[float | None] = [None] * n_trackers
        self.since: list[int] = [0] * n_trackers
        self.family_states = family_states


class Engine:
    """Builds bars for one ordered stream of tick records."""

    def __init__(
        self,
        specs: Sequence[BarSpec],
        lateness_ns: int,
        limits: StreamLimits | None = None,
        revision_window_ns: int = 0,
    ) -> None:
        if not specs:
            raise ValueError("an engine needs at least one bar spec")
        self.specs: tuple[BarSpec, ...] = tuple(specs)
        self.lateness_ns = lateness_ns
        # Revisions: a bar closed by time stays revisable this long after it closed (0: never).
        self.revision_window_ns = revision_window_ns
        self.revisions = revision_window_ns > 0
        if any(spec.revisions != self.revisions for spec in self.specs):
            raise ValueError("bar specs parsed for revisions need an engine with a revision window, and only those")
        self.limits = limits if limits is not None else StreamLimits()
        self.stats = EngineStats()
        # Event-time guards: ticks above the horizon are held (the stream's time is
        # confirmed up to the watermark, and ticks may run max_jump_ns ahead of it);
        # the live service sets the wall clock (set_wall_clock) before each batch.
        self._guard = ClockGuard(self.limits)
        self._horizon = UNCONFIRMED
        self._max_jump_ns = self.limits.max_jump_ns
        self._max_behind_ns = self.limits.max_behind_ns
        self._max_symbols = self.limits.max_symbols
        self._max_levels = self.limits.max_depth_levels
        # A flag, not a huge sentinel: comparing a tick's time with an int beyond the
        # compiled code's small-int range would box the time on every tick.
        self._wall_clock = False
        self._wall_limit_ns = 0  # later ticks are rejected as future
        self._wall_floor_ns = 0  # ticks from here to _wall_limit_ns are never held
        # Each spec's family and groups; the quantities its groups weight by time, each
        # followed once per symbol however many specs use it.
        tracker_index: dict[str, int] = {}
        self._trackers: list[Tracker] = []
        for spec in self.specs:
            for group in spec.stat_groups:
                for tracker in group.trackers:
                    if tracker.name not in tracker_index:
                        tracker_index[tracker.name] = len(self._trackers)
                        self._trackers.append(tracker)
        self._tracker_names = [tracker.name for tracker in self._trackers]
        self._layouts = [
            BarLayout(spec.text, spec.family, spec.stat_groups, tracker_index, self.revisions) for spec in self.specs
        ]
        # Trades are signed, and quote changes shown to groups, only for bar sets that ask.
        self._signs = any(layout.signs for layout in self._layouts)
        self._quotes = any(layout.quote_accs for layout in self._layouts)
        self._symbols: dict[str, _SymbolState] = {}
        self._watermark = 0
        self._closed_through = -1  # time bars with end <= this are closed
        # Time bars waiting to close, by end: (end, order, bar, symbol state, spec index).
        self._due: list[tuple[int, int, OpenBar, _SymbolState, int]] = []
        self._next_due = _NO_CLOSE
        self._order = 0
        self._bars: list[Bar] = []  # every publication (revisions included)
        self._final: list[Bar] = []  # revisions: each bar once, when it can change no more
        # Published bars that may still be revised, by end (then symbol and spec, so that
        # a restored engine expires them in the same order): (end, symbol, index, bar, state).
        self._revisable: list[tuple[int, str, int, OpenBar, _SymbolState]] = []
        self._rejects: list[Reject] = []

    # -- public API ------------------------------------------------------------------

    @property
    def watermark_ns(self) -> int:
        """The largest accepted event time so far (0 before any message)."""
        return self._watermark

    @property
    def symbols(self) -> int:
        return len(self._symbols)

    def book(self, symbol: str) -> SymbolBook | None:
        """The book of ``symbol``, or ``None`` if it has not been seen."""
        state = self._symbols.get(symbol)
        return state.book if state is not None else None

    def books(self) -> Iterable[SymbolBook]:
        return (state.book for state in self._symbols.values())

    def open_bar_count(self) -> int:
        """Bars being built (one per symbol and spec at most)."""
        return sum(1 for state in self._symbols.values() for bar in state.bars if bar is not None)

    def process(self, records: Sequence[Any], positions: Sequence[int], source: str) -> None:
        """Feed decoded msgpack records (tick maps, or arrays of them) in stream order.
        ``positions[i]`` locates ``records[i]`` for the rejects file."""
        if len(records) != len(positions):
            raise ValueError("records and positions differ in length")
        # Compiled, indexing a list is a direct read; a Sequence goes through the
        # generic item protocol twice per record. Sources hand over lists.
        record_list: list[Any] = records if type(records) is list else list(records)
        position_list: list[int] = positions if type(positions) is list else list(positions)
        # Direct self._on_record calls: compiled, they are native calls (a cached
        # bound method would go through the generic Python call path).
        for i in range(len(record_list)):
            record = record_list[i]
            position = position_list[i]
            if type(record) is list:
                for item in record:
                    self._on_record(item, position, source)
            else:
                self._on_record(record, position, source)

    def close_through(self, limit_ns: int) -> None:
        """Close every time bar whose end is at or before ``limit_ns`` (the idle rule);
        later messages for those intervals count as late."""
        if limit_ns > self._closed_through:
            self._closed_through = limit_ns
            if limit_ns >= self._next_due:
                self._sweep(limit_ns)
            if self._revisable:
                self._expire()

    def finish(self) -> None:
        """Input ended: decide the held ticks, then emit every open bar, marked
        incomplete. Their spread windows run up to the last event time seen (the
        watermark)."""
        release, rejected = self._guard.settle_all()
        self._use_held(release, rejected)
        self._sweep(_NO_CLOSE - 1, complete=False)
        until = self._watermark
        for state in self._symbols.values():
            for index, bar in enumerate(state.bars):
                if bar is not None:
                    layout = self._layouts[index]
                    if bar.revision >= 0:  # published, revisable no more
                        self._seal(bar, layout, state, bar.end)
                        self._publish(bar, layout, True, False, state.family_states[index], final_only=True)
                    else:
                        self._seal(bar, layout, state, until)
                        self._emit(bar, layout, False, until == bar.start, state.family_states[index])
                    state.bars[index] = None
        self._revisable.clear()

    def set_wall_clock(self, now_ns: int) -> None:
        """The live service's wall clock (replay never calls this). A tick more than
        ``limits.max_ahead_of_wall_ns`` past it is rejected as ``future``; one within
        ``limits.max_jump_ns`` of it needs no confirmation from the rest of the stream
        (the wall clock confirms it)."""
        ahead = self.limits.max_ahead_of_wall_ns
        self._wall_clock = True
        self._wall_limit_ns = now_ns + ahead if ahead is not None else _MAX_TS
        self._wall_floor_ns = now_ns - self._max_jump_ns

    def take_bars(self) -> list[Bar]:
        """Finished bars since the last call, in the order they closed."""
        bars, self._bars = self._bars, []
        return bars

    def take_final_bars(self) -> list[Bar]:
        """Bars that can change no more, since the last call, each once (for sinks that
        publish only final bars). Without a revision window, every bar is final when it
        is published: then this is :meth:`take_bars`' list, which the caller takes once."""
        bars, self._final = self._final, []
        return bars

    def take_rejects(self) -> list[Reject]:
        """Rejected records since the last call."""
        rejects, self._rejects = self._rejects, []
        return rejects

    def reject(self, reject: Reject) -> None:
        """Record a reject found before the engine (framing errors); counted by reason."""
        self.stats.records += 1
        self.stats.rejected[reject.reason.value] += 1
        self._rejects.append(reject)

    # -- checkpoints -----------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        """The engine's whole state as plain data (see :mod:`barsmith.checkpoint`).
        Finished bars and rejects must have been taken first. Each part serializes
        itself: books, open bars (with their groups' accumulators), families' per-symbol
        state, the event-time guard."""
        if self._bars or self._final or self._rejects:
            raise StateError("take_bars() and take_rejects() before a checkpoint: output is pending")
        bar_ids: dict[int, int] = {}
        bars: list[list[Any]] = []

        def bar_ref(bar: OpenBar, index: int) -> int:
            # Open time bars are both in their symbol's slot and in the due-heap.
            key = id(bar)
            if key not in bar_ids:
                bar_ids[key] = len(bars)
                bars.append([index, bar.to_state()])
            return bar_ids[key]

        symbols = []
        families = [layout.family for layout in self._layouts]
        for sym, state in self._symbols.items():
            symbols.append(
                [
                    sym,
                    state.book.to_state(),
                    {name: [state.tracked[k], state.since[k]] for k, name in enumerate(self._tracker_names)},
                    [family.state_to_data(fs) for family, fs in zip(families, state.family_states, strict=True)],
                    [None if bar is None else bar_ref(bar, index) for index, bar in enumerate(state.bars)],
                ]
            )
        due = [[end, order, bar_ref(bar, i), state.book.symbol, i] for end, order, bar, state, i in self._due]
        stats = self.stats
        return {
            "watermark": self._watermark,
            "horizon": self._horizon,
            "guard": self._guard.to_state(),
            "closed_through": self._closed_through,
            "order": self._order,
            "bars": bars,
            "symbols": symbols,
            "due": due,
            "stats": [
                stats.records,
                stats.accepted,
                stats.duplicates,
                stats.gaps,
                stats.late,
                stats.time_regressions,
                dict(stats.rejected),
                dict(stats.bars),
                dict(stats.outside),
                stats.revisions,
            ],
        }

    @classmethod
    def from_state(
        cls,
        specs: Sequence[BarSpec],
        lateness_ns: int,
        data: dict[str, Any],
        limits: StreamLimits | None = None,
        revision_window_ns: int = 0,
    ) -> Engine:
        """Rebuild an engine from :meth:`to_state` output (same specs, lateness and
        revision window)."""
        engine = cls(specs, lateness_ns, limits, revision_window_ns)
        layouts = engine._layouts
        bars = [layouts[int(index)].bar_from_state(item) for index, item in data["bars"]]
        families = [layout.family for layout in layouts]
        for sym_data, book_data, tracked, family_data, refs in data["symbols"]:
            sym = str(sym_data)
            if len(refs) != len(layouts):
                raise StateError(f"checkpoint has {len(refs)} bar slots for {sym}, expected {len(layouts)}")
            state = engine._new_symbol(sym)
            state.book.restore(book_data)
            for k, name in enumerate(engine._tracker_names):
                if name in tracked:
                    value, since = tracked[name]
                    state.tracked[k], state.since[k] = value, int(since)
            state.family_states = [f.state_from_data(sym, d) for f, d in zip(families, family_data, strict=True)]
            state.bars = [None if ref is None else bars[int(ref)] for ref in refs]
        for end, order, ref, sym, index in data["due"]:
            engine._due.append((int(end), int(order), bars[int(ref)], engine._symbols[str(sym)], int(index)))
        heapq.heapify(engine._due)
        for state in engine._symbols.values():
            for index, bar in enumerate(state.bars):
                if bar is not None and bar.revision >= 0:
                    engine._revisable.append((bar.end, state.book.symbol, index, bar, state))
        heapq.heapify(engine._revisable)
        engine._next_due = engine._due[0][0] if engine._due else _NO_CLOSE
        engine._watermark = int(data["watermark"])
        engine._horizon = int(data["horizon"])
        engine._guard.restore(data["guard"], decode_tick)
        engine._closed_through = int(data["closed_through"])
        engine._order = int(data["order"])
        stats = engine.stats
        values: list[Any] = data["stats"]
        stats.records, stats.accepted, stats.duplicates = int(values[0]), int(values[1]), int(values[2])
        stats.gaps, stats.late, stats.time_regressions = int(values[3]), int(values[4]), int(values[5])
        stats.rejected.update({str(k): int(v) for k, v in values[6].items()})
        stats.bars.update({str(k): int(v) for k, v in values[7].items()})
        if len(values) > 8:
            stats.outside.update({str(k): int(v) for k, v in values[8].items()})
            stats.revisions = int(values[9])
        return engine

    def _new_symbol(self, sym: str) -> _SymbolState:
        families = [layout.family.new_state(sym) for layout in self._layouts]
        state = self._symbols[sym] = _SymbolState(sym, len(self._layouts), len(self._trackers), families)
        return state

    # -- the hot path ----------------------------------------------------------------

    def _on_record(self, record: Any, position: int, source: str) -> None:
        stats = self.stats
        stats.records += 1
        try:
            # Records of the usual shape arrive already decoded and checked (fastwire).
            tick = record if type(record) is Tick else decode_tick(record)
        except MalformedTickError as exc:
            stats.rejected[exc.reason.value] += 1
            self._rejects.append(_reject_of(record, position, source, exc.reason, exc.detail))
            return
        t = tick.ts
        if self._wall_clock and t > self._wall_limit_ns:
            ahead = format_duration_ns(t - self._wall_limit_ns)
            self._refuse(
                record,
                position,
                source,
                RejectReason.FUTURE,
                f"ts is more than {ahead} past the wall clock's limit",
                tick,
            )
            return
        if t > self._horizon and not (self._wall_clock and self._wall_floor_ns <= t):
            # Ahead of the stream's confirmed time (and not near the live wall clock).
            self._hold(tick, record, position, source)
            return
        if self._guard.held:
            self._use_held([], self._guard.normal(tick.sym))
        self._accept(tick, record, position, source)

    def _accept(self, tick: Tick, record: Any, position: int, source: str) -> None:
        # Deliberately one long function: it runs once per tick and every call and
        # attribute lookup it saves shows in throughput.
        stats = self.stats
        state = self._symbols.get(tick.sym)
        if state is None:
            if len(self._symbols) >= self._max_symbols:
                detail = f"this stream already has {self._max_symbols:,} symbols (limits.max_symbols)"
                self._refuse(record, position, source, RejectReason.SYMBOL_LIMIT, detail, tick)
                return
            state = self._new_symbol(tick.sym)
        book = state.book
        if tick.bids is not None or tick.asks is not None or book.depth:
            problem = book.depth_problem(tick, self._max_levels)
            if problem is not None:
                too_many, detail = problem
                reason = RejectReason.TOO_MANY_LEVELS if too_many else RejectReason.MIXED_BOOK
                self._refuse(record, position, source, reason, detail, tick)
                return
        regressions = book.time_regressions
        outcome = book.admit(tick, self._max_behind_ns)
        if outcome is _DUPLICATE:
            stats.duplicates += 1
            return
        if outcome is _BACKDATED:
            behind = format_duration_ns(book.last_ts - tick.ts)
            detail = f"ts is {behind} behind the symbol's last ts (limit {format_duration_ns(self._max_behind_ns)})"
            self._refuse(record, position, source, RejectReason.BACKDATED, detail, tick)
            return
        stats.accepted += 1
        gap = 1 if outcome is _GAP else 0
        stats.gaps += gap
        if book.time_regressions != regressions:
            stats.time_regressions += 1
        t = tick.ts
        if t > self._watermark:
            self._watermark = t
            self._horizon = t + self._max_jump_ns
            limit = t - self.lateness_ns
            if limit > self._closed_through:
                self._closed_through = limit
                if limit >= self._next_due:
                    self._sweep(limit)
                if self._revisable:
                    self._expire()

        px = tick.trade_px
        qty = 0.0
        if px is not None and not tick.is_snapshot:  # a snapshot's trade fields are state
            qty = tick.trade_qty or 0.0
        else:
            px = None
        bars = state.bars
        layouts = self._layouts
        sign = 0
        if px is not None and self._signs:
            sign = book.sign_trade(px)

        # Every spec's bar, through its family's fixed calls (no family-specific code).
        late_specs: list[str] | None = None
        closing: list[int] | None = None
        revised: list[int] | None = None
        for index in range(len(layouts)):
            layout = layouts[index]
            family = layout.family
            bar = bars[index]
            fstate = state.family_states[index]
            if bar is not None and t >= bar.seal_at:
                # The symbol moved past this bar: freeze it (before this message's
                # effect on the book). A bar closed by time waits to be due; any
                # other can take nothing more, so it is complete now.
                self._seal(bar, layout, state, bar.end)
                bars[index] = None
                if not family.closes_by_time:
                    self._emit(bar, layout, True, bar.end == bar.start, fstate)
                elif bar.revision >= 0:  # published: the symbol moved on, so it is final
                    self._publish(bar, layout, True, False, fstate, final_only=True)
                elif family.fills:
                    following = self._fill(state, index, bar.end, t)
                    if following is not None and t < following[0]:
                        # Between the family's intervals (outside its sessions).
                        stats.outside[layout.spec_text] += 1
                        self._open_empty(state, index, following)
                        continue
                bar = None
            if bar is None:
                if family.opens_on_trade and px is None:
                    continue
                start, end, seal_at = family.window(t, fstate)
                if start == DECLINE:
                    stats.outside[layout.spec_text] += 1
                    if family.fills:
                        self._open_empty(state, index, family.next_window(t, fstate))
                    continue
                closed = family.closes_by_time and end <= self._closed_through
                if closed and end <= self._closed_through - self.revision_window_ns:
                    if late_specs is None:
                        late_specs = []
                    late_specs.append(layout.spec_text)
                    continue
                bar = bars[index] = layout.new_bar(tick.sym, start, end, seal_at)
                self._opened(bar, layout, state, fstate)
                if family.closes_by_time and not closed:
                    self._push_due(bar, state, index)
            bar.messages += 1
            bar.gaps += gap
            if self.revisions and family.closes_by_time and bar.end <= self._closed_through:
                # A straggler inside the revision window: its bar is published again.
                if revised is None:
                    revised = []
                revised.append(index)
            if px is not None:
                accs = bar.accs
                for j in layout.trade_accs:
                    accs[j].trade(px, qty, sign, book)
                if family.counts_trades and family.trade(bar, fstate, px, qty, t):
                    if closing is None:
                        closing = []
                    closing.append(index)
        if late_specs is not None:
            stats.late += 1
            self._rejects.append(
                _reject_of(
                    record,
                    position,
                    source,
                    RejectReason.LATE,
                    f"time bar already closed for {', '.join(late_specs)}; used for the book and event bars",
                    tick,
                )
            )

        if self._quotes:
            self._apply_watched(book, tick, outcome, bars)
        else:
            book.apply(tick, outcome)
        # Time-weighted quantities (the spread ...): open bars are credited only when
        # one changes, with the span the old value held.
        trackers = self._trackers
        for k in range(len(trackers)):
            value = trackers[k].value(book)
            old = state.tracked[k]
            if value != old:
                since = state.since[k]
                for index in range(len(layouts)):
                    bar = bars[index]
                    if bar is not None:
                        accs = bar.accs
                        for j, slot in layouts[index].held[k]:
                            accs[j].held(slot, old, since, t, bar.start)
                state.tracked[k] = value
                state.since[k] = t
        if revised is not None:
            for index in revised:
                bar = bars[index]
                assert bar is not None
                self._revise(bar, self._layouts[index], state, index)
        if closing is not None:
            for index in closing:
                bar = bars[index]
                assert bar is not None
                layout = layouts[index]
                self._seal(bar, layout, state, t)
                bars[index] = None
                self._emit(bar, layout, True, t == bar.start, state.family_states[index])

    def _apply_watched(self, book: SymbolBook, tick: Tick, outcome: Outcome, bars: list[OpenBar | None]) -> None:
        """Apply the message to the book and show the change to the groups that follow
        quote changes (``on_quote``), with the top of book as it was (None: undefined)."""
        if book.is_live:
            bid_px, bid_qty, ask_px, ask_qty = book.bid_px, book.bid_qty, book.ask_px, book.ask_qty
        else:
            bid_px = bid_qty = ask_px = ask_qty = None
        book.apply(tick, outcome)
        layouts = self._layouts
        for index in range(len(layouts)):
            bar = bars[index]
            if bar is not None:
                accs = bar.accs
                for j in layouts[index].quote_accs:
                    accs[j].quote(bid_px, bid_qty, ask_px, ask_qty, book)

    def _opened(self, bar: OpenBar, layout: BarLayout, state: _SymbolState, family_state: Any) -> None:
        """A new bar learns the tracked values in effect (before its first message)."""
        if layout.family.has_columns:
            layout.family.opened(bar, family_state)
        accs = bar.accs
        for k, j, slot in layout.tracked:
            accs[j].opened(slot, state.tracked[k])

    def _seal(self, bar: OpenBar, layout: BarLayout, state: _SymbolState, until: int) -> None:
        """The bar's window ends at ``until``: credit the tracked values still in effect,
        and let it take its closing book (the book as it stands now)."""
        accs = bar.accs
        for k, j, slot in layout.tracked:
            accs[j].held(slot, state.tracked[k], state.since[k], until, bar.start)
        book = state.book
        for j in layout.book_accs:
            accs[j].closing(book)

    # -- the event-time guard (rare paths) ---------------------------------------------

    def _hold(self, tick: Tick, record: Any, position: int, source: str) -> None:
        symbols = self._symbols
        only_symbol = not symbols or (len(symbols) == 1 and tick.sym in symbols)
        release, rejected = self._guard.hold(tick, record, position, source, only_symbol)
        self._use_held(release, rejected)

    def _use_held(self, release: list[HeldTick], rejected: list[HeldTick]) -> None:
        """Reject contradicted held ticks; use confirmed ones, in arrival order."""
        for entry in rejected:
            detail = "ts is far ahead of the stream's time and the rest of the stream did not follow it"
            self._refuse(entry.record, entry.position, entry.source, RejectReason.FUTURE, detail, entry.tick)
        for entry in release:
            if self._guard.held:
                self._use_held([], self._guard.normal(entry.tick.sym, entry.order))
            self._accept(entry.tick, entry.record, entry.position, entry.source)

    def _refuse(self, record: Any, position: int, source: str, reason: RejectReason, detail: str, tick: Tick) -> None:
        self.stats.rejected[reason.value] += 1
        self._rejects.append(_reject_of(record, position, source, reason, detail, tick))

    # -- time bar closing ------------------------------------------------------------

    def _push_due(self, bar: OpenBar, state: _SymbolState, index: int) -> None:
        self._order += 1
        heapq.heappush(self._due, (bar.end, self._order, bar, state, index))
        if bar.end < self._next_due:
            self._next_due = bar.end

    def _sweep(self, limit_ns: int, complete: bool = True) -> None:
        """Emit the time bars whose end is at or before ``limit_ns``, oldest first."""
        due = self._due
        while due and due[0][0] <= limit_ns:
            end, _, bar, state, index = heapq.heappop(due)
            layout = self._layouts[index]
            fstate = state.family_states[index]
            if state.bars[index] is bar:
                # Still the symbol's open bar: its last message is the symbol's last.
                if complete and self.revisions and not layout.family.fills:
                    # Published, but kept open for stragglers inside the revision window.
                    self._revise(bar, layout, state, index)
                    continue
                self._seal(bar, layout, state, end if complete else min(end, self._watermark))
                state.bars[index] = None
                if complete and layout.family.fills:
                    # The symbol's next interval, open until a message or the clock.
                    self._open_empty(state, index, self._fill(state, index, end, end))
            self._emit(bar, layout, complete, False, fstate)
        self._next_due = due[0][0] if due else _NO_CLOSE

    def _fill(self, state: _SymbolState, index: int, after: int, now: int) -> tuple[int, int] | None:
        """A ``fills`` family: bars for the intervals from ``after`` that ended by
        ``now``, without messages (sealed at once, emitted when due); returns the next
        interval, which has not ended."""
        layout = self._layouts[index]
        family = layout.family
        fstate = state.family_states[index]
        window = family.next_window(after, fstate)
        while window is not None and window[1] <= now:
            bar = layout.new_bar(state.book.symbol, window[0], window[1], window[1])
            self._opened(bar, layout, state, fstate)
            self._seal(bar, layout, state, window[1])
            self._push_due(bar, state, index)
            window = family.next_window(window[1], fstate)
        return window

    def _open_empty(self, state: _SymbolState, index: int, window: tuple[int, int] | None) -> None:
        """Keep ``window`` open in the symbol's slot, without messages, until a message
        lands in it or the clock closes it (then it is a filled bar)."""
        if window is None:
            return
        layout = self._layouts[index]
        bar = state.bars[index] = layout.new_bar(state.book.symbol, window[0], window[1], window[1])
        self._opened(bar, layout, state, state.family_states[index])
        self._push_due(bar, state, index)

    def _emit(self, bar: OpenBar, layout: BarLayout, complete: bool, empty_window: bool, family_state: Any) -> None:
        """Publish a bar that can change no more (to every sink)."""
        self._publish(bar, layout, complete, empty_window, family_state)

    def _publish(
        self,
        bar: OpenBar,
        layout: BarLayout,
        complete: bool,
        empty_window: bool,
        family_state: Any,
        final: bool = True,
        final_only: bool = False,
    ) -> None:
        """``final``: the bar can change no more (sinks of final bars take it too);
        ``final_only``: its last revision was already published (only they take it)."""
        record = bar.finish(layout, complete, empty_window, family_state)
        if not final_only:
            self.stats.bars[bar.spec_text] += 1
            self._bars.append(record)
        if self.revisions and (final or final_only):
            self._final.append(record)

    def _revise(self, bar: OpenBar, layout: BarLayout, state: _SymbolState, index: int) -> None:
        """Publish (again) a revisable bar whose interval is closed: a sealed copy goes out,
        the bar itself stays open for stragglers until the window passes."""
        first = bar.revision < 0
        bar.revision += 1
        if first:
            heapq.heappush(self._revisable, (bar.end, state.book.symbol, index, bar, state))
        else:
            self.stats.revisions += 1
        copy = bar.copy(layout)
        self._seal(copy, layout, state, bar.end)
        self._publish(copy, layout, True, False, state.family_states[index], final=False)

    def _expire(self) -> None:
        """Bars whose revision window passed can change no more: final, and let go."""
        limit = self._closed_through - self.revision_window_ns
        revisable = self._revisable
        while revisable and revisable[0][0] <= limit:
            end, _, index, bar, state = heapq.heappop(revisable)
            if state.bars[index] is bar:
                layout = self._layouts[index]
                self._seal(bar, layout, state, end)
                self._publish(bar, layout, True, False, state.family_states[index], final_only=True)
                state.bars[index] = None


def _reject_of(
    record: Any, position: int, source: str, reason: RejectReason, detail: str, tick: Tick | None = None
) -> Reject:
    reject = Reject(source, position, reason, detail, pack_record(record))
    if tick is not None:
        reject.symbol, reject.seq, reject.ts = tick.sym, tick.seq, tick.ts
    elif type(record) is dict:
        sym, seq, ts = record.get("sym"), record.get("seq"), record.get("ts")
        reject.symbol = sym if type(sym) is str else None
        reject.seq = seq if type(seq) is int and -(2**63) <= seq < 2**63 else None
        reject.ts = ts if type(ts) is int and -(2**63) <= ts < 2**63 else None
    return reject
