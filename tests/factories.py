"""Factories for tests: wire-format ticks, an engine runner, recorded feed files."""

from __future__ import annotations

import gzip
import re
import socket
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import msgpack
from hypothesis import strategies as st

from barsmith.bars.bar import Bar
from barsmith.bars.spec import parse_specs
from barsmith.engine import Engine
from barsmith.ingest.eventtime import StreamLimits

T0 = 1_798_794_000_000_000_000  # 2027-01-01 09:00 UTC, an invented session start
S = 1_000_000_000  # one second in ns
MS = 1_000_000


def tick(
    sym: str = "FENWORTH~KESMOOR", ts: int = T0, seq: int = 1, kind: str = "delta", **fields: Any
) -> dict[str, Any]:
    """A wire-format tick map; extra keyword arguments become fields as given."""
    return {"sym": sym, "ts": ts, "seq": seq, "kind": kind, **fields}


def snap(sym: str = "FENWORTH~KESMOOR", ts: int = T0, seq: int = 1, **quotes: Any) -> dict[str, Any]:
    return tick(sym, ts, seq, "snapshot", **quotes)


def trade(sym: str, ts: int, seq: int, px: float, qty: float, **fields: Any) -> dict[str, Any]:
    return tick(sym, ts, seq, "delta", trade_px=px, trade_qty=qty, **fields)


def run_engine(
    records: Sequence[Any],
    specs: Sequence[str] = ("time:1m",),
    lateness_ns: int = 0,
    finish: bool = True,
    limits: StreamLimits | None = None,
) -> tuple[list[Bar], Engine]:
    """Feed records through one engine; returns (bars in emission order, engine)."""
    engine = Engine(parse_specs(list(specs)), lateness_ns, limits)
    engine.process(list(records), list(range(len(records))), "test")
    bars = engine.take_bars()
    if finish:
        engine.finish()
        bars += engine.take_bars()
    return bars, engine


def write_records(path: Path, records: Iterable[Any], compress: bool = False) -> Path:
    data = b"".join(msgpack.packb(r, use_bin_type=True) for r in records)
    path.write_bytes(gzip.compress(data) if compress else data)
    return path


def free_port_pair() -> int:
    """A free loopback TCP port whose successor is free too (broker + controller, or two workers)."""
    for _ in range(50):
        with socket.socket() as first:
            first.bind(("127.0.0.1", 0))
            port = int(first.getsockname()[1])
        with socket.socket() as second:
            try:
                second.bind(("127.0.0.1", port + 1))
            except OSError:
                continue
        return port
    raise RuntimeError("no free port pair on 127.0.0.1")


FEED_SYMBOLS = ["FENWORTH~KESMOOR", "MARROWAY~KESMOOR"]
FEED_SPECS = ("time:1s", "time:1m", "trades:3", "volume:25", "notional:1000")


@st.composite
def feeds(draw: st.DrawFn) -> list[dict[str, Any]]:
    n = draw(st.integers(1, 120))
    recs = []
    ts = T0
    seq = dict.fromkeys(FEED_SYMBOLS, 0)
    for _ in range(n):
        sym = draw(st.sampled_from(FEED_SYMBOLS))
        ts += draw(st.integers(-S, 3 * S))  # event time may go backwards a little
        step = draw(st.sampled_from([1, 1, 1, 1, 0, -1, 3]))  # duplicates, stale, gaps
        seq[sym] = max(0, seq[sym] + step)
        rec: dict[str, Any] = {"sym": sym, "ts": max(1, ts), "seq": seq[sym]}
        rec["kind"] = draw(st.sampled_from(["delta"] * 6 + ["snapshot"]))
        if draw(st.booleans()):
            bid = draw(st.integers(95, 100)) * 1.0
            rec.update(bid_px=bid, ask_px=bid + draw(st.integers(1, 3)) * 0.5)
        if draw(st.booleans()):
            rec.update(trade_px=draw(st.integers(90, 110)) * 1.0, trade_qty=float(draw(st.integers(1, 20))))
        recs.append(rec)
    return recs


README = Path(__file__).resolve().parents[1] / "README.md"


def readme_blocks(language: str, text: str | None = None) -> list[str]:
    """The fenced code blocks of the README (or of ``text``) in ``language``, in order."""
    source = README.read_text() if text is None else text
    return re.findall(rf"^```{language}\n(.*?)^```$", source, flags=re.M | re.S)
