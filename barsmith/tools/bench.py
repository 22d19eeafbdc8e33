"""``barsmith bench``: replay throughput against plain msgpack decoding of the same bytes.

Generates N ticks with the synthetic generator into a temporary file, then measures
in one run:

* decode-only: ``msgpack.Unpacker`` over the file's bytes, doing nothing else;
* replay: ``barsmith replay`` of the same file with ``time:1m``, ``volume:…`` and
  ``notional:…`` together, writing Parquet;
* their ratio;
* peak memory (max RSS) of a replay in a child process, at N/4 and at N ticks, to
  show that memory does not grow with the number of ticks.

Figures are from one run on this machine; they are not assertions.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Final

import msgpack

from barsmith.tools.synth import SynthConfig, write_feed

BENCH_SPECS: Final = ("time:1m", "volume:20000", "notional:2e6")


def _decode_only_rate(path: Path) -> tuple[int, float]:
    data = path.read_bytes()
    start = time.perf_counter()
    unpacker = msgpack.Unpacker(raw=False, max_buffer_size=len(data) + 1)
    unpacker.feed(data)
    count = 0
    for _ in unpacker:
        count += 1
    return count, count / (time.perf_counter() - start)


def _replay_child(path: Path, out: Path) -> dict[str, float]:
    """Replay in a fresh process; returns its throughput and peak RSS."""
    code = (
        "import json, sys, time\n"
        "from barsmith.replay import replay_files\n"
        "t = time.perf_counter()\n"
        f"s = replay_files([{str(path)!r}], {str(out)!r}, bars={list(BENCH_SPECS)!r}, replace=True)\n"
        "e = time.perf_counter() - t\n"
        # VmHWM, not ru_maxrss: Linux carries ru_maxrss across exec, so a child would
        # report the parent's peak (the parent holds the whole feed in memory).
        "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM:')][0].split()[1]\n"
        "print(json.dumps({'ticks': s.stats.records, 'seconds': e, 'engine_s': s.elapsed_s,"
        " 'rss_kib': int(hwm)}))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    result: dict[str, float] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


def _span(rates: list[float]) -> str:
    return f"min {min(rates):,.0f}, max {max(rates):,.0f}"


def run_bench(ticks: int, symbols: int, seed: int, rounds: int = 3) -> list[str]:
    """Run the benchmark; returns the report lines."""
    lines = [f"barsmith bench: {ticks:,} ticks, {symbols} symbols, seed {seed}, specs {', '.join(BENCH_SPECS)}"]
    with tempfile.TemporaryDirectory(prefix="barsmith-bench-") as tmp:
        root = Path(tmp)
        small_n = max(1, ticks // 4)
        feeds = {}
        for n in (small_n, ticks):
            feed = root / f"feed-{n}.msgpack"
            started = time.perf_counter()
            write_feed(feed, SynthConfig(seed=seed, symbols=symbols, messages=n, duration_s=max(3600.0, n / 200)))
            took = time.perf_counter() - started
            lines.append(f"generated {n:,} ticks ({feed.stat().st_size:,} bytes) in {took:.1f} s")
            feeds[n] = feed
        # This class of machine varies a lot from second to second, so decode-only and
        # replay are measured in interleaved rounds and compared by their medians.
        small = _replay_child(feeds[small_n], root / "out-small")
        decode_rates: list[float] = []
        replay_rates: list[float] = []
        replay: dict[str, float] = {}
        count = 0
        for _ in range(rounds):
            count, rate = _decode_only_rate(feeds[ticks])
            decode_rates.append(rate)
            replay = _replay_child(feeds[ticks], root / "out")
            replay_rates.append(replay["ticks"] / replay["engine_s"])
        decode_rate = statistics.median(decode_rates)
        replay_rate = statistics.median(replay_rates)
        lines += [
            f"rounds (interleaved)           : {rounds}",
            f"decode-only (msgpack.Unpacker) : {decode_rate:12,.0f} ticks/s  (median; {_span(decode_rates)})",
            f"replay, 3 specs, Parquet out   : {replay_rate:12,.0f} ticks/s  (median; {_span(replay_rates)})",
            f"ratio of medians               : {replay_rate / decode_rate:12.2f}"
            f"  (per round: {', '.join(f'{r / d:.2f}' for r, d in zip(replay_rates, decode_rates, strict=True))})",
            f"peak RSS replaying {small_n:>11,} ticks: {small['rss_kib'] / 1024:8.1f} MiB",
            f"peak RSS replaying {ticks:>11,} ticks: {replay['rss_kib'] / 1024:8.1f} MiB"
            f"  (ratio {replay['rss_kib'] / small['rss_kib']:.2f})",
        ]
        assert count == replay["ticks"], "decode-only and replay must see the same records"
    return lines
