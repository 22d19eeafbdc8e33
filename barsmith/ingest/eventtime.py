"""Event-time plausibility: one bad clock must not poison a stream.

A stream's progress is its watermark (the largest accepted ``ts``). A single tick
whose ``ts`` is years ahead -- a vendor clock fault -- would move it, making every
later tick of every symbol *late*, and clamping its own symbol's later ticks to the
future. But a recorded file may also jump for real: overnight, over a weekend.
The two look alike in one tick; they differ in what the rest of the stream does.

**The rule.** A tick more than ``max_jump_ns`` ahead of the stream's progress (or any
tick before the stream has a confirmed time at all) is *held*: not used yet, and not
touching any book, the watermark or the clamp. Held ticks are

* **released** -- used, in arrival order, as if they arrived now -- once the jump is
  *confirmed*: held ticks of two different symbols lie within about ``max_jump_ns``
  of each other (a stream that has only ever had one symbol: two of its ticks);
* **rejected** with reason ``future`` once they are *contradicted*: their own symbol
  sends a tick in the stream's time (its clock came back), or two other symbols do
  (the stream carried on without them), or ``contradict_messages`` ticks in the
  stream's time arrived since.

So a real gap costs one tick of delay for a liquid stream; a lone bad clock costs
that one tick (and, for its symbol, a sequence gap: a message the book did not see).

Bounds: at most ``max_held`` ticks are held. When the hold is full, or input ends,
the oldest held tick is rejected if any tick in the stream's time arrived after it,
and otherwise its neighbourhood is confirmed (nothing contradicted it: the stream
has moved on). The trade-off: a clock fault shared by two symbols at once, or
a bad tick that nothing follows, is taken for the stream's own progress.

Every operation is O(1) amortised; the hot path (a tick in the stream's time with
nothing held) costs one comparison in the engine.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Final

from barsmith.ingest.ticks import Tick

UNCONFIRMED: Final = -1  # the horizon before a stream has a confirmed time: every tick is held


@dataclass(frozen=True, slots=True)
class StreamLimits:
    """Plausibility limits of one stream (see :class:`~barsmith.settings.GuardSettings`)."""

    max_jump_ns: int = 3_600 * 1_000_000_000
    max_ahead_of_wall_ns: int | None = 600 * 1_000_000_000
    max_behind_ns: int = 300 * 1_000_000_000
    max_held: int = 10_000
    contradict_messages: int = 1_000
    max_symbols: int = 200_000
    max_depth_levels: int = 1_000  # price levels per side of a depth book


class HeldTick:
    """A tick waiting for its time to be confirmed, with what the engine needs to use
    or reject it later."""

    __slots__ = ("done", "normal_at", "order", "position", "record", "source", "tick")

    def __init__(self, order: int, normal_at: int, tick: Tick, record: Any, position: int, source: str) -> None:
        self.order = order  # arrival order among the stream's ticks
        self.normal_at = normal_at  # ticks in the stream's time seen before it
        self.tick = tick
        self.record = record
        self.position = position
        self.source = source
        self.done = False  # released or rejected (entries are removed lazily)


class ClockGuard:
    """The hold of one stream (see the module docstring for the rule)."""

    def __init__(self, limits: StreamLimits) -> None:
        self.max_jump_ns = limits.max_jump_ns
        self.max_held = limits.max_held
        self.contradict_messages = limits.contradict_messages
        self.held = 0
        self._order = 0
        self._normal = 0  # ticks in the stream's time so far
        self._last_normal_order = -1
        # The two most recent distinct symbols seen in the stream's time, with when.
        self._recent_sym: str | None = None
        self._recent_order = -1
        self._other_sym: str | None = None
        self._other_order = -1
        self._queue: list[HeldTick] = []  # arrival order; done entries are dropped lazily
        self._queue_start = 0
        self._by_symbol: dict[str, list[HeldTick]] = {}  # lazily: may hold done entries
        self._held_by_symbol: dict[str, int] = {}
        self._buckets: dict[int, dict[str, int]] = {}  # ts // max_jump_ns -> symbol -> held

    # -- the engine's calls ------------------------------------------------------------

    def normal(self, sym: str, order: int = -1) -> list[HeldTick]:
        """A tick of ``sym`` in the stream's time is about to be used (``order``: its
        arrival order, when it was held itself). Returns the held ticks this contradicts."""
        if order < 0:
            order = self._next_order()
        self._normal += 1
        if order > self._last_normal_order:
            self._last_normal_order = order
        if sym != self._recent_sym:
            self._other_sym, self._other_order = self._recent_sym, self._recent_order
            self._recent_sym = sym
        self._recent_order = order
        if not self.held:
            return []
        rejected: list[HeldTick] = []
        if self._held_by_symbol.get(sym):
            for entry in self._by_symbol[sym]:
                if not entry.done and entry.order < order:
                    rejected.append(self._remove(entry))
        # Two other symbols spoke after it, or many ticks did: a prefix of the queue.
        both_after = min(self._recent_order, self._other_order) if self._other_sym is not None else -1
        while self._queue_start < len(self._queue):
            entry = self._queue[self._queue_start]
            if not entry.done:
                if entry.order >= both_after and self._normal - entry.normal_at < self.contradict_messages:
                    break
                rejected.append(self._remove(entry))
            self._queue_start += 1
        for sym_touched in {entry.tick.sym for entry in rejected}:
            self._tidy_symbol(sym_touched)
        self._compact()
        return rejected

    def hold(
        self, tick: Tick, record: Any, position: int, source: str, only_symbol: bool
    ) -> tuple[list[HeldTick], list[HeldTick]]:
        """Hold a tick that is ahead of the stream's time. Returns (ticks to use now, in
        arrival order; ticks to reject as ``future``). ``only_symbol``: the stream has
        used no symbol but this one so far."""
        self._add(HeldTick(self._next_order(), self._normal, tick, record, position, source))
        if self._confirmed_near(tick, only_symbol):
            return self._confirm(tick.ts), []
        if self.held > self.max_held:
            return self._settle_oldest()
        return [], []

    def settle_all(self) -> tuple[list[HeldTick], list[HeldTick]]:
        """Input ended: decide every held tick (see the module docstring)."""
        release: list[HeldTick] = []
        rejected: list[HeldTick] = []
        while self.held:
            more, fewer = self._settle_oldest()
            release += more
            rejected += fewer
        return release, rejected

    def pending(self) -> list[HeldTick]:
        """The held ticks, in arrival order."""
        return [entry for entry in self._queue[self._queue_start :] if not entry.done]

    # -- checkpoints -----------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        """The guard as plain data (held ticks as their wire maps)."""
        return {
            "order": self._order,
            "normal": self._normal,
            "last_normal": self._last_normal_order,
            "recent": [self._recent_sym, self._recent_order, self._other_sym, self._other_order],
            "held": [[e.order, e.normal_at, e.tick.to_wire(), e.position, e.source] for e in self.pending()],
        }

    def restore(self, data: dict[str, Any], decode: Any) -> None:
        """Inverse of :meth:`to_state`; ``decode`` turns a wire map back into a tick."""
        self._order = int(data["order"])
        self._normal = int(data["normal"])
        self._last_normal_order = int(data["last_normal"])
        recent: list[Any] = data["recent"]
        self._recent_sym, self._recent_order = recent[0], int(recent[1])
        self._other_sym, self._other_order = recent[2], int(recent[3])
        for order, normal_at, wire, position, source in data["held"]:
            tick = decode(wire)
            self._add(HeldTick(int(order), int(normal_at), tick, tick, int(position), str(source)))

    # -- internals -------------------------------------------------------------------

    def _next_order(self) -> int:
        self._order += 1
        return self._order

    def _add(self, entry: HeldTick) -> None:
        sym = entry.tick.sym
        self._queue.append(entry)
        self._by_symbol.setdefault(sym, []).append(entry)
        self._held_by_symbol[sym] = self._held_by_symbol.get(sym, 0) + 1
        bucket = self._buckets.setdefault(entry.tick.ts // self.max_jump_ns, {})
        bucket[sym] = bucket.get(sym, 0) + 1
        self.held += 1

    def _near(self, ts: int) -> list[int]:
        index = ts // self.max_jump_ns
        return [i for i in (index - 1, index, index + 1) if i in self._buckets]

    def _confirmed_near(self, tick: Tick, only_symbol: bool) -> bool:
        symbols: set[str] = set()
        count = 0
        for index in self._near(tick.ts):
            bucket = self._buckets[index]
            symbols.update(bucket)
            count += sum(bucket.values())
        if len(symbols) >= 2:
            return True
        # A stream that has only ever had this one symbol: its own second tick confirms.
        return only_symbol and len(self._held_by_symbol) == 1 and count >= 2

    def _confirm(self, ts: int) -> list[HeldTick]:
        """Release every held tick up to the confirmed time's horizon, in arrival order."""
        near = set(self._near(ts))
        latest = max(
            [ts, *(e.tick.ts for e in self.pending() if e.tick.ts // self.max_jump_ns in near)],
        )
        limit = latest + self.max_jump_ns
        release = [entry for entry in self.pending() if entry.tick.ts <= limit]
        for entry in release:
            self._remove(entry)
        for sym in {entry.tick.sym for entry in release}:
            self._tidy_symbol(sym)
        self._compact()
        return release

    def _oldest(self) -> HeldTick:
        self._compact()
        return self._queue[self._queue_start]

    def _settle_oldest(self) -> tuple[list[HeldTick], list[HeldTick]]:
        oldest = self._oldest()
        if self._last_normal_order > oldest.order:  # the stream spoke after it, in its own time
            self._remove(oldest)
            self._tidy_symbol(oldest.tick.sym)
            self._compact()
            return [], [oldest]
        return self._confirm(oldest.tick.ts), []

    def _remove(self, entry: HeldTick) -> HeldTick:
        entry.done = True
        self.held -= 1
        sym = entry.tick.sym
        self._held_by_symbol[sym] -= 1
        index = entry.tick.ts // self.max_jump_ns
        bucket = self._buckets[index]
        bucket[sym] -= 1
        if not bucket[sym]:
            del bucket[sym]
            if not bucket:
                del self._buckets[index]
        return entry

    def _tidy_symbol(self, sym: str) -> None:
        """Drop done entries from a symbol's list once they are most of it (amortised O(1))."""
        count = self._held_by_symbol.get(sym, 0)
        if not count:
            self._held_by_symbol.pop(sym, None)
            self._by_symbol.pop(sym, None)
            return
        entries = self._by_symbol[sym]
        if len(entries) > 2 * count + 8:
            self._by_symbol[sym] = [e for e in entries if not e.done]

    def _compact(self) -> None:
        while self._queue_start < len(self._queue) and self._queue[self._queue_start].done:
            self._queue_start += 1
        if not self.held:
            self._queue = []
            self._queue_start = 0
        elif self._queue_start > 1024 and self._queue_start * 2 > len(self._queue):
            self._queue = self._queue[self._queue_start :]
            self._queue_start = 0
