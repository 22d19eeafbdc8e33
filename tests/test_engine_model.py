"""The engine against a brute-force model (tests/bar_model.py), column by column.

The feeds are drawn at the edges: timestamps exactly on and one nanosecond around
interval boundaries, equal timestamps, time regressions, sequence gaps, duplicates,
stale messages, snapshots (with empty sides), side clears, trades on snapshots (state,
not trades), malformed records, batched records, the idle rule's ``close_through``
between messages, several symbols interleaved and five specs at once -- so that a gap
or a snapshot is often the first message of a new interval.

The same check runs on one engine, on an engine checkpointed and restored at a
random point, and through the replay source split by partition.
"""

from __future__ import annotations

import asyncio
import random
from pathlib import Path
from typing import Any

import msgpack
import pandas as pd
from bar_model import model_bars, run_model, same_value
from factories import T0, S
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from barsmith.bars.bar import BAR_COLUMNS, Bar
from barsmith.bars.spec import parse_specs
from barsmith.bus.topics import partition_for
from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
from barsmith.engine import Engine
from barsmith.replay import replay_files
from barsmith.runner import Runner
from barsmith.sinks.base import MemorySink
from barsmith.sources.files import FileSource

SYMS = ["FENWORTH~KESMOOR", "MARROWAY~KESMOOR", "QUILLFERN~KESMOOR"]
SPEC_TEXTS = ["time:1s", "time:3s", "trades:2", "volume:5", "notional:120"]
SPECS = parse_specs(SPEC_TEXTS)
MODEL_SPECS = [
    (spec.text, spec.kind.value, float(spec.interval_ns) if spec.is_time else spec.threshold) for spec in SPECS
]
MS = 1_000_000

Events = list[tuple[str, Any]]


class _Digits:
    """Reads choices out of one big integer: hypothesis draws one number per message
    (fast, and it shrinks towards 0, the plainest choice of every field)."""

    def __init__(self, code: int) -> None:
        self.code = code

    def take(self, n: int) -> int:
        self.code, value = divmod(self.code, n)
        return value

    def pick(self, options: list[Any]) -> Any:
        return options[self.take(len(options))]


_QUOTE_VALUES = {
    "bid_px": [10.0, 9.5, 10.25],
    "bid_qty": [1.0, 0.0, 2.5],
    "ask_px": [10.5, 10.25, 11.0],
    "ask_qty": [1.0, 0.0, 3.0],
}


def _next_ts(d: _Digits, clock: int) -> tuple[int, int]:
    """(the message's ts, the new clock): aimed at interval boundaries."""
    move = d.pick(["step", "edge", "same", "edge", "edge3", "step", "back"])
    if move == "same":
        return clock, clock
    if move in ("edge", "edge3"):
        grid = S if move == "edge" else 3 * S
        ts = max(clock, (clock // grid + 1) * grid + d.pick([0, -1, 1, 0]))
        return ts, ts
    if move == "step":
        ts = clock + 1 + d.take(700) * MS
        return ts, ts
    # Behind the clock: a time regression for its symbol, or late for the stream.
    return max(1, clock - 1 - d.take(1500) * MS), clock


def _quotes(d: _Digits, snapshot: bool) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for side in ("bid", "ask"):
        if snapshot:
            if d.take(4) != 3:  # a snapshot's absent side is empty
                out[f"{side}_px"] = d.pick(_QUOTE_VALUES[f"{side}_px"])
                out[f"{side}_qty"] = d.pick(_QUOTE_VALUES[f"{side}_qty"])
            continue
        for key in (f"{side}_px", f"{side}_qty"):
            choice = d.take(10)
            if choice >= 7:
                out[key] = d.pick(_QUOTE_VALUES[key])
            elif choice == 6:
                out[key] = None  # clears the side
    return out


def _message(d: _Digits, clock: int, seqs: dict[str, int]) -> tuple[Any, int]:
    sym = d.pick(SYMS)
    ts, clock = _next_ts(d, clock)
    step = d.pick([1, 1, 1, 1, 1, 1, 0, -1, 2, 5])
    seqs[sym] = max(0, seqs[sym] + step) if sym in seqs else d.take(4)
    seq = seqs[sym]
    if d.take(34) == 33:
        return d.pick([{"sym": sym, "ts": "soon", "seq": seq, "kind": "delta"}, ["not", "a", "map"]]), clock
    snapshot = d.take(5) == 4
    rec: dict[str, Any] = {"sym": sym, "ts": ts, "seq": seq, "kind": "snapshot" if snapshot else "delta"}
    rec.update(_quotes(d, snapshot))
    if d.take(5) >= 3:
        rec["trade_px"] = d.pick([10.0, 9.75, 10.5, 12.0])
        rec["trade_qty"] = d.pick([1.0, 0.1, 0.5, 2.0, 3.0])
    return rec, clock


@st.composite
def edge_feeds(draw: st.DrawFn) -> Events:
    size = draw(st.integers(1, 60))
    codes = draw(st.lists(st.integers(0, 2**110), min_size=size, max_size=size))
    events: Events = []
    clock = T0 + [0, S - 1, S, 3 * S - 1][draw(st.integers(0, 3))]
    seqs: dict[str, int] = {}
    for code in codes:
        d = _Digits(code)
        what = d.take(18)
        if what == 17:
            base = clock - clock % S
            events.append(("close", base + d.pick([0, -S, -1, 1, S])))
            continue
        if what == 16:
            batch = []
            for _ in range(2 + d.take(2)):
                rec, clock = _message(d, clock, seqs)
                batch.append(rec)
            events.append(("tick", batch))
            continue
        rec, clock = _message(d, clock, seqs)
        events.append(("tick", rec))
    return events


def run_engine_events(events: Events, lateness_ns: int, cut: int | None = None) -> tuple[list[Bar], Engine]:
    """The engine over ``events``; with ``cut``, checkpointed and restored before event ``cut``."""
    engine = Engine(SPECS, lateness_ns)
    bars: list[Bar] = []
    for index, (what, value) in enumerate(events):
        if index == cut:
            bars += engine.take_bars()
            engine.take_rejects()
            engine, _ = decode_checkpoint(encode_checkpoint(engine, {"cut": cut}), SPECS, lateness_ns)
        if what == "close":
            engine.close_through(value)
        else:
            engine.process([value], [index], "model")
        bars += engine.take_bars()
    engine.finish()
    return bars + engine.take_bars(), engine


def check_against_model(bars: list[Bar] | list[dict[str, Any]], events: Events, lateness_ns: int) -> None:
    expected = model_bars(run_model(events, MODEL_SPECS, lateness_ns), MODEL_SPECS)
    got: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for bar in bars:
        row = bar.as_dict() if isinstance(bar, Bar) else bar
        got.setdefault((row["spec"], row["symbol"]), []).append(row)
    assert sorted(got) == sorted(expected), "bars for other (spec, symbol) pairs than the model's"
    for key, rows in expected.items():
        mine = got[key]
        assert len(mine) == len(rows), f"{key}: {len(mine)} bars, the model has {len(rows)}"
        for number, (ours, theirs) in enumerate(zip(mine, rows, strict=True)):
            for column in BAR_COLUMNS:
                assert same_value(ours[column], theirs[column]), (
                    f"{key} bar {number} ({theirs['start']}..{theirs['end']}): {column} is {ours[column]!r}, "
                    f"the model says {theirs[column]!r}"
                )


LATENESS = st.sampled_from([0, 1, S // 2, 2 * S])


@settings(max_examples=2000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(edge_feeds(), LATENESS, st.data())
def test_engine_equals_the_model_also_across_a_checkpoint(events: Events, lateness: int, data: st.DataObject) -> None:
    bars, engine = run_engine_events(events, lateness)
    check_against_model(bars, events, lateness)
    model = run_model(events, MODEL_SPECS, lateness)
    assert engine.stats.accepted == len(model.accepted)
    assert engine.stats.duplicates == model.duplicates
    assert engine.stats.gaps == sum(1 for m in model.accepted if m.gap)
    assert engine.stats.late == sum(1 for m in model.accepted if m.late_for)
    assert sum(engine.stats.rejected.values()) == model.rejected
    # Checkpointed and restored at a random point: the same bars.
    cut = data.draw(st.integers(0, len(events)), label="cut")
    restored, _ = run_engine_events(events, lateness, cut)
    check_against_model(restored, events, lateness)


def _write_ticks(path: Path, events: Events) -> Events:
    """The tick events as a recorded feed (the idle rule does not exist in replay)."""
    ticks = [(what, value) for what, value in events if what == "tick"]
    path.write_bytes(b"".join(msgpack.packb(value, use_bin_type=True) for _, value in ticks))
    return ticks


def _partition_events(events: Events, partitions: int, partition: int) -> Events:
    out: Events = []
    for _, value in events:
        items = value if type(value) is list else [value]
        mine = [item for item in items if _partition_of(item, partitions) == partition]
        out += [("tick", item) for item in mine]
    return out


def _partition_of(item: Any, partitions: int) -> int:
    sym = item.get("sym") if type(item) is dict else None
    return partition_for(sym if type(sym) is str else None, partitions)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(edge_feeds(), LATENESS, st.sampled_from([2, 3]))
def test_replay_by_partition_equals_the_model_per_partition(events: Events, lateness: int, partitions: int) -> None:
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "feed.msgpack"
        ticks = _write_ticks(path, events)
        sink = MemorySink()
        runner = Runner(SPECS, lateness, FileSource([path], partitions=partitions), [sink], MemorySink())
        asyncio.run(runner.serve())
    for partition in range(partitions):
        mine = [bar for bar in sink.bars if partition_for(bar.symbol, partitions) == partition]
        check_against_model(mine, _partition_events(ticks, partitions, partition), lateness)


def _random_feed(seed: int, n: int) -> Events:
    """A longer feed of the same kind, from a seeded generator (no hypothesis)."""
    rng = random.Random(seed)
    events: Events = []
    clock = T0
    seqs: dict[str, int] = {}
    for _ in range(n):
        sym = rng.choice(SYMS)
        clock = (clock // S + 1) * S + rng.choice([-1, 0, 1]) if rng.random() < 0.3 else clock + rng.randint(0, S // 3)
        seqs[sym] = max(0, seqs.get(sym, 0) + rng.choice([1, 1, 1, 1, 1, 0, -1, 2, 4]))
        rec: dict[str, Any] = {"sym": sym, "ts": clock, "seq": seqs[sym]}
        rec["kind"] = "snapshot" if rng.random() < 0.15 else "delta"
        if rec["kind"] == "snapshot" or rng.random() < 0.4:
            bid = rng.choice([9.5, 10.0, 10.25])
            rec.update(bid_px=bid, bid_qty=1.0, ask_px=bid + rng.choice([0.25, 0.5]), ask_qty=2.0)
        if rng.random() < 0.4:
            rec.update(trade_px=rng.choice([9.75, 10.0, 10.5]), trade_qty=rng.choice([0.5, 1.0, 2.0]))
        events.append(("tick", rec))
    return events


def test_replay_to_parquet_equals_the_model(tmp_path: Path) -> None:
    # End to end: the replay command's library call, Parquet read back with pandas.
    events = _random_feed(seed=9, n=6_000)
    path = tmp_path / "feed.msgpack"
    _write_ticks(path, events)
    replay_files([path], tmp_path / "out", bars=SPEC_TEXTS, lateness_ms=500, partitions=2)
    frame = pd.read_parquet(tmp_path / "out")
    rows = []
    for row in frame.to_dict("records"):
        row = {k: (None if isinstance(v, float) and v != v else v) for k, v in row.items()}  # NaN → null
        row["start"], row["end"] = row["start"].value, row["end"].value
        row["trades"], row["messages"], row["gaps"] = int(row["trades"]), int(row["messages"]), int(row["gaps"])
        row["complete"] = bool(row["complete"])
        rows.append(row)
    order = {text: i for i, text in enumerate(SPEC_TEXTS)}
    rows.sort(key=lambda r: (order[r["spec"]], r["symbol"], r["start"], r["end"]))
    for partition in range(2):
        mine = [r for r in rows if partition_for(r["symbol"], 2) == partition]
        check_against_model(mine, _partition_events(events, 2, partition), 500 * MS)
