"""Hostile values mixed into a valid feed must cost nothing valid (README, "Bad input",
"Event time"): a soak of 100,000 hostile records through ``replay``, and a flood of a
million distinct junk symbols with memory bounded by ``limits.max_symbols``."""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
from pathlib import Path

import msgpack
import pandas as pd
import pytest
from factories import T0

from barsmith.ingest.framed import FramedWriter
from barsmith.replay import replay_files
from barsmith.tools.synth import SynthConfig, generate

SPECS = ["time:1m", "volume:5000", "notional:1e6"]
YEAR_NS = 365 * 24 * 3600 * 10**9


def hostile_values(rng: random.Random, n: int) -> list[bytes]:
    """``n`` msgpack values of every wrong shape a tick can take, plus well-formed ticks
    of junk symbols with wild clocks (independent faults: far apart in time)."""
    base = {"sym": "JUNK", "ts": T0, "seq": 1, "kind": "delta"}

    def junk_sym() -> str:
        return f"JUNK{rng.randrange(5_000):04d}"

    makers = [
        lambda: {**base, "ts": rng.choice(["soon", 1.5, None, [], True, -5, 0, 2**63, 2**64 - 1])},
        lambda: {**base, "seq": rng.choice(["1", -1, 2**63, 1.0, False, {}])},
        lambda: {**base, "sym": rng.choice(["", "x" * 65, "TAB\tSYM", 7, None, b"bytes", "x" * 60_000])},
        lambda: {**base, "kind": rng.choice(["refresh", "", 3, None, "SNAPSHOT"])},
        lambda: {**base, "bid_px": rng.choice([float("nan"), float("inf"), -1.0, 0.0, "10", True])},
        lambda: {**base, "ask_qty": rng.choice([float("-inf"), -0.5, "lots", [1]])},
        lambda: {**base, "trade_px": 10.0},  # half a trade
        lambda: {**base, "trade_qty": 1.0},
        lambda: {**base, "trade_px": 10.0, "trade_qty": 0.0},
        lambda: rng.choice([[], [1, 2], "tick", 42, None, 3.5, b"\x00\x01", True]),
        lambda: [[[[rng.random()]]]],  # nested arrays: not maps
        lambda: {k: v for k, v in base.items() if k != rng.choice(list(base))},  # a required key missing
        lambda: {rng.randrange(100): "int keys", **base},  # odd keys are ignored, the tick is valid-shaped
        # Well-formed ticks whose clock is wildly wrong, on junk symbols.
        lambda: {
            **base,
            "sym": junk_sym(),
            "ts": max(1, T0 + rng.choice([1, -1]) * rng.randrange(YEAR_NS, 20 * YEAR_NS)),
            "trade_px": 1.0,
            "trade_qty": 1.0,
        },
    ]
    out = []
    for _ in range(n):
        value = rng.choice(makers)()
        if isinstance(value, dict) and rng.random() < 0.05:
            value = [value, dict(value)]  # a batch of hostile items
        out.append(msgpack.packb(value, use_bin_type=True))
    out.append(msgpack.packb(msgpack.ExtType(5, b"ext payload"), use_bin_type=True))
    return out


def _valid_feed(n: int) -> list[bytes]:
    cfg = SynthConfig(messages=n, symbols=8, duration_s=1_200, seed=5)
    return [msgpack.packb(msg, use_bin_type=True) for msg in generate(cfg)]


def _frame(out: Path) -> pd.DataFrame:
    frame = pd.read_parquet(out)
    return frame.sort_values(["spec", "symbol", "start", "end"]).reset_index(drop=True)


@pytest.mark.parametrize("form", ["framed", "plain"])
def test_a_soak_of_hostile_values_costs_no_valid_tick(tmp_path: Path, form: str) -> None:
    rng = random.Random(2027)
    valid = _valid_feed(40_000)
    hostile = hostile_values(rng, 100_000)
    mixed: list[bytes] = []
    slots = sorted(rng.sample(range(len(valid) + len(hostile)), len(hostile)))
    h = v = 0
    for index in range(len(valid) + len(hostile)):
        if h < len(slots) and slots[h] == index:
            mixed.append(hostile[h])
            h += 1
        else:
            mixed.append(valid[v])
            v += 1
    (tmp_path / "clean.msgpack").write_bytes(b"".join(valid))
    _write(tmp_path / "mixed.msgpack", mixed, form)
    clean = replay_files([tmp_path / "clean.msgpack"], tmp_path / "clean", bars=SPECS)
    soaked = replay_files([tmp_path / "mixed.msgpack"], tmp_path / "mixed", bars=SPECS)

    # Nothing valid lost, nothing valid late: the valid symbols' bars are the clean run's.
    expected = _frame(tmp_path / "clean")
    got = _frame(tmp_path / "mixed")
    got = got[~got["symbol"].str.startswith("JUNK")].reset_index(drop=True)
    pd.testing.assert_frame_equal(got, expected)
    rejects = pd.read_parquet(tmp_path / "mixed" / "_rejects.parquet")
    valid_late = rejects[(rejects["reason"] == "late") & ~rejects["symbol"].fillna("").str.startswith("JUNK")]
    assert len(valid_late) == clean.stats.late
    # Every record is counted once -- accepted, duplicate or rejected -- and every reject is
    # recorded (a batch counts its items).
    stats = soaked.stats
    assert stats.accepted + stats.duplicates + sum(stats.rejected.values()) == stats.records
    assert len(rejects) == sum(stats.rejected.values()) + stats.late
    assert stats.rejected["future"] > 0 and stats.rejected["wrong_type"] > 0
    if form == "framed":
        # Blocks say where each record starts, so each hostile record is exactly one record.
        assert stats.records == clean.stats.records + _items(hostile)
    else:
        # A plain file says nothing of where records start: a value that is no tick followed
        # by one that is no tick either reads as damage, and the reader counts the damaged
        # span (not_msgpack) instead of the values in it -- still counted, still recorded.
        assert abs(stats.records - (clean.stats.records + _items(hostile))) < len(hostile) // 100
        assert stats.rejected["not_msgpack"] > 0


def _write(path: Path, records: list[bytes], form: str) -> None:
    if form == "plain":
        path.write_bytes(b"".join(records))
        return
    with path.open("wb") as handle:
        writer = FramedWriter(handle)
        writer.write_all(records)
        writer.flush()


def _items(values: list[bytes]) -> int:
    count = 0
    for raw in values:
        value = msgpack.unpackb(raw, strict_map_key=False)
        count += len(value) if type(value) is list else 1
    return count


def test_a_million_junk_symbols_keep_memory_bounded(tmp_path: Path) -> None:
    def peak_rss_kib(junk: int) -> int:
        feed = tmp_path / f"junk-{junk}.msgpack"
        packer = msgpack.Packer(use_bin_type=True)
        with feed.open("wb") as handle:
            for i in range(junk):
                handle.write(packer.pack({"sym": f"J{i:07d}", "ts": T0 + i, "seq": 1, "kind": "delta"}))
        code = (
            "import json, os\n"
            "from barsmith.replay import replay_files\n"
            f"s = replay_files([{str(feed)!r}], {str(tmp_path / f'out-{junk}')!r}, bars=['time:1m'])\n"
            "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM:')][0].split()[1]\n"
            "print(json.dumps({'symbols': s.stats.accepted, 'limit': s.stats.rejected['symbol_limit'],"
            " 'rss': int(hwm)}))\n"
        )
        env = dict(os.environ, BARSMITH_LIMITS__MAX_SYMBOLS="20000")
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
        result: dict[str, int] = json.loads(done.stdout.strip().splitlines()[-1])
        assert result["symbols"] == 20_000 and result["limit"] == junk - 20_000
        return result["rss"]

    small, large = peak_rss_kib(200_000), peak_rss_kib(1_000_000)
    # Five times the junk, the same memory (within a tenth): bounded by the symbol limit.
    print(f"peak RSS: {small} KiB at 200k junk symbols, {large} KiB at 1M")
    assert large <= small * 1.1, (small, large)
