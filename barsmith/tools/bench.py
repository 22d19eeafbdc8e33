"""``barsmith bench``: start-up, and replay against plain msgpack decoding of the same bytes.

Generates feeds with the synthetic generator into a temporary directory (N ticks, N/4
ticks, and a one-record file), then measures, in interleaved rounds, whole processes
as a user starts them (interpreter start-up included):

* start-up: ``barsmith --help``, and ``barsmith replay`` of the one-record file to Parquet;
* decode-only: a child Python that reads the file and iterates ``msgpack.Unpacker``
  over its bytes, doing nothing else;
* replay: ``barsmith replay`` of the same file with ``time:1m``, ``volume:…`` and
  ``notional:…`` together, writing Parquet, at N/4 and at N ticks;
* the ratio of their throughputs (decode-only seconds / replay seconds) per round, and
  peak memory (the replay's VmHWM) at both sizes: memory does not grow with the
  number of ticks.

With ``--bootstrap`` the service's figures through that broker follow
(:mod:`barsmith.tools.bench_bus`). Figures are from one run on this machine; they are
not assertions.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Final

import msgpack

from barsmith.tools.synth import SynthConfig, write_feed

BENCH_SPECS: Final = ("time:1m", "volume:20000", "notional:2e6")

# A child that decodes a feed and nothing else, counting the records.
_DECODE_ONLY: Final = (
    "import sys, msgpack\n"
    "data = open(sys.argv[1], 'rb').read()\n"
    "unpacker = msgpack.Unpacker(raw=False, max_buffer_size=len(data) + 1)\n"
    "unpacker.feed(data)\n"
    "print(sum(1 for _ in unpacker))\n"
)
# The barsmith command in a child, as its console script runs it, reporting its peak
# memory (VmHWM, not ru_maxrss: Linux carries ru_maxrss across exec, so a child would
# report its parent's peak).
_COMMAND: Final = (
    "import sys\n"
    "from barsmith.cli import main\n"
    "try:\n"
    "    status = main(sys.argv[1:])\n"
    "except SystemExit as exc:\n"
    "    status = exc.code\n"
    "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM:')][0].split()[1]\n"
    "print('peak-kib', hwm, file=sys.stderr)\n"
    "sys.exit(status)\n"
)


def _timed(argv: Sequence[str]) -> tuple[float, str, str]:
    """Wall seconds of a whole child process, and what it printed (out, err)."""
    started = time.perf_counter()
    done = subprocess.run(list(argv), check=True, capture_output=True, text=True)
    return time.perf_counter() - started, done.stdout, done.stderr


def _barsmith(*args: str) -> tuple[float, int]:
    """Wall seconds and peak KiB of ``barsmith ARGS`` in a child process."""
    seconds, _, err = _timed([sys.executable, "-c", _COMMAND, *args])
    peak = next(int(line.split()[1]) for line in err.splitlines() if line.startswith("peak-kib"))
    return seconds, peak


def _decode_only(feed: Path) -> tuple[float, int]:
    seconds, out, _ = _timed([sys.executable, "-c", _DECODE_ONLY, str(feed)])
    return seconds, int(out.strip())


def _replay(feed: Path, out: Path, *specs: str) -> tuple[float, int]:
    bars = [arg for spec in specs for arg in ("--bars", spec)]
    return _barsmith("replay", str(feed), *bars, "--out", str(out), "--replace", "--quiet")


def _span(values: Sequence[float], unit: str = "") -> str:
    return f"min {min(values):,.3f}{unit}, max {max(values):,.3f}{unit}"


def _per_round(values: Sequence[float]) -> str:
    return ", ".join(f"{v:.2f}" for v in values)


def _one_record_feed(path: Path) -> Path:
    tick = {"sym": "FENWORTH~KESMOOR", "ts": 1_798_794_000_000_000_000, "seq": 1, "kind": "snapshot", "bid_px": 10.0}
    path.write_bytes(msgpack.packb(tick))
    return path


def run_bench(ticks: int, symbols: int, seed: int, rounds: int = 3) -> list[str]:
    """Run the benchmark; returns the report lines."""
    lines = [
        f"barsmith bench: {ticks:,} ticks, {symbols} symbols, seed {seed}, specs {', '.join(BENCH_SPECS)}; "
        f"whole processes, {rounds} interleaved rounds, medians"
    ]
    with tempfile.TemporaryDirectory(prefix="barsmith-bench-") as tmp:
        root = Path(tmp)
        sizes = (max(1, ticks // 4), ticks)
        feeds = {}
        for n in sizes:
            feed = root / f"feed-{n}.msgpack"
            started = time.perf_counter()
            write_feed(feed, SynthConfig(seed=seed, symbols=symbols, messages=n, duration_s=max(3600.0, n / 200)))
            took = time.perf_counter() - started
            lines.append(f"generated {n:,} ticks ({feed.stat().st_size:,} bytes) in {took:.1f} s")
            feeds[n] = feed
        one = _one_record_feed(root / "one.msgpack")
        help_s: list[float] = []
        tiny_s: list[float] = []
        decode_s: dict[int, list[float]] = {n: [] for n in sizes}
        replay_s: dict[int, list[float]] = {n: [] for n in sizes}
        peak_kib: dict[int, int] = {}
        # This class of machine varies a lot from second to second: each round runs
        # every measurement once, and the figures are the rounds' medians.
        for _ in range(rounds):
            help_s.append(_barsmith("--help")[0])
            tiny_s.append(_replay(one, root / "out-one", "time:1m")[0])
            for n, feed in feeds.items():
                seconds, count = _decode_only(feed)
                decode_s[n].append(seconds)
                assert count == n, "decode-only must see every record"
                seconds, peak_kib[n] = _replay(feed, root / f"out-{n}", *BENCH_SPECS)
                replay_s[n].append(seconds)
        lines += [
            f"start-up, barsmith --help            : {statistics.median(help_s):8.3f} s  ({_span(help_s, ' s')})",
            f"start-up, replay of a one-record file: {statistics.median(tiny_s):8.3f} s  ({_span(tiny_s, ' s')})",
        ]
        for n in sizes:
            ratios = [d / r for d, r in zip(decode_s[n], replay_s[n], strict=True)]
            decode, replay = statistics.median(decode_s[n]), statistics.median(replay_s[n])
            lines += [
                f"{n:>11,} ticks: decode-only (msgpack.Unpacker) {decode:7.3f} s = {n / decode:12,.0f} ticks/s",
                f"{n:>11,} ticks: replay, 3 specs, Parquet out  {replay:7.3f} s = {n / replay:12,.0f} ticks/s",
                f"{n:>11,} ticks: replay / decode-only throughput {statistics.median(ratios):.2f}"
                f"  (per round: {_per_round(ratios)})",
            ]
        small, large = sizes
        lines += [
            f"peak RSS replaying {small:>11,} ticks: {peak_kib[small] / 1024:8.1f} MiB",
            f"peak RSS replaying {large:>11,} ticks: {peak_kib[large] / 1024:8.1f} MiB"
            f"  (ratio {peak_kib[large] / peak_kib[small]:.2f})",
        ]
    return lines
