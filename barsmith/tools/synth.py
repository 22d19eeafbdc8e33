"""A seeded synthetic feed for demos and benchmarks.

The scenario is invented: the Kestrelmoor Exchange (venue code ``KESMOOR``) and listings
whose names are made-up words. Symbols differ widely in liquidity (message rates
spread log-uniformly over three orders of magnitude); spreads are one to a few ticks;
each symbol gets a full snapshot every ``snapshot_every_s`` of event time; a few
messages are lost (sequence gaps) or sent twice (duplicates); arrival order jitters
across symbols by up to ``jitter_ms`` while each symbol stays in order. Optionally a
number of malformed records are mixed in, to exercise the rejects path.

With ``order_flow`` the trades follow a more realistic sign process: the side of a
symbol's trade repeats the previous one with probability ``sign_persistence`` (order
flow is persistent), a share of trades match at the midpoint (signed by the tick test,
not the quote), and a share of trades move the mid a tick their way (price impact).
Without it, each trade's side is an independent coin toss at the touch (the bundled
demo feed).

With ``depth`` > 0 the feed carries depth levels instead of top-of-book fields:
``depth`` levels per side one tick apart from the touch, the touch's sizes as in the
top-of-book feed and deeper sizes a fixed pattern of the mid; snapshots list every
level, deltas the levels that changed (qty 0 for one that went).

The same arguments always give the same bytes.
"""

from __future__ import annotations

import gzip
import heapq
import math
import random
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any, cast

import msgpack

VENUE = "KESMOOR"
_NAMES = (
    "FENWORTH", "MARROWAY", "QUILLFERN", "BRASSWICK", "LUMENDALE", "TALLOWMERE",
    "CORVESTRA", "DUNHOLLOW", "EMBERLOCH", "GLIMMERTON", "HAZELCROFT", "IRONVALE",
    "JASPERGATE", "KELPMOUTH", "LARKSPIRE", "MOSSBOROUGH", "NETTLEBANK", "OAKENSHAW",
    "PEWTERFIELD", "RUSHCOMBE", "SALTMARSH", "THISTLEWOOD", "UMBERLY", "WILLOWRAKE",
)  # fmt: skip
MAX_SYMBOLS = len(_NAMES)  # listings the generator can invent


@dataclass(frozen=True, slots=True)
class SynthConfig:
    """Knobs of the generator; the defaults make the bundled demo feed."""

    seed: int = 7
    symbols: int = 12
    messages: int = 250_000
    duration_s: float = 75 * 60
    start_ns: int = 1_798_794_000_000_000_000  # 2027-01-01 09:00:00 UTC, an invented session
    snapshot_every_s: float = 30.0
    trade_share: float = 0.22
    gap_rate: float = 0.0004
    duplicate_rate: float = 0.0006
    jitter_ms: float = 40.0
    malformed: int = 0
    order_flow: bool = False  # the sign process below (off: the demo feed's coin tosses)
    sign_persistence: float = 0.8  # P(a trade is on the same side as the symbol's last one)
    midpoint_share: float = 0.1  # trades matched at the midpoint
    impact_share: float = 0.1  # trades after which the mid moves a tick their way
    depth: int = 0  # levels per side (0: top-of-book fields)


@dataclass(slots=True)
class _Listing:
    symbol: str
    rate_per_s: float
    tick: float
    mid_ticks: int
    half_spread_ticks: int
    bid_qty: float
    ask_qty: float
    seq: int = 0
    last_snapshot_ns: int = -(10**18)
    last_arrival_ns: int = 0
    last_message: dict[str, Any] | None = None
    last_buy: bool = True
    sent_bids: dict[float, float] | None = None  # the depth levels last sent
    sent_asks: dict[float, float] | None = None


def _listings(cfg: SynthConfig, rng: random.Random) -> list[_Listing]:
    if not 1 <= cfg.symbols <= MAX_SYMBOLS:
        raise ValueError(f"symbols must be between 1 and {MAX_SYMBOLS}")
    # Relative activity spread log-uniformly over ~3 decades, then scaled to fit.
    weights = [10 ** (3.0 * i / max(1, cfg.symbols - 1)) for i in range(cfg.symbols)]
    total_rate = cfg.messages / cfg.duration_s
    listings = []
    for i, weight in enumerate(weights):
        tick = rng.choice((0.01, 0.05, 0.25))
        liquid = weight >= 30
        listings.append(
            _Listing(
                symbol=f"{_NAMES[i]}~{VENUE}",
                rate_per_s=total_rate * weight / sum(weights),
                tick=tick,
                mid_ticks=rng.randint(400, 40_000),
                half_spread_ticks=1 if liquid else rng.randint(1, 2),
                bid_qty=float(rng.randint(1, 40) * 100),
                ask_qty=float(rng.randint(1, 40) * 100),
            )
        )
    return listings


def _px(listing: _Listing, ticks: int) -> float:
    return round(ticks * listing.tick, 6)


def _quote_fields(listing: _Listing) -> dict[str, Any]:
    bid = listing.mid_ticks - listing.half_spread_ticks
    ask = listing.mid_ticks + listing.half_spread_ticks
    return {
        "bid_px": _px(listing, bid),
        "bid_qty": listing.bid_qty,
        "ask_px": _px(listing, ask),
        "ask_qty": listing.ask_qty,
    }


def _event(listing: _Listing, ts: int, cfg: SynthConfig, rng: random.Random) -> dict[str, Any]:
    """Advance one listing by one message and return it (before loss/duplication)."""
    listing.seq += 1
    msg: dict[str, Any] = {"sym": listing.symbol, "ts": ts, "seq": listing.seq}
    if ts - listing.last_snapshot_ns >= cfg.snapshot_every_s * 1e9:
        listing.last_snapshot_ns = ts
        msg["kind"] = "snapshot"
        msg.update(_quote_fields(listing))
        return msg
    msg["kind"] = "delta"
    roll = rng.random()
    if roll < cfg.trade_share and cfg.order_flow:
        _flow_trade(listing, msg, cfg, rng)
    elif roll < cfg.trade_share:
        buy = rng.random() < 0.5
        qty = _trade_at_touch(listing, msg, buy, float(rng.choice((1, 5, 10, 25, 50, 100, 100, 200, 300, 500))))
        _consume_touch(listing, msg, buy, qty, rng)
    elif roll < 0.45:
        # The mid moves by a tick; both sides re-quote.
        listing.mid_ticks = max(listing.half_spread_ticks + 5, listing.mid_ticks + rng.choice((-1, 1)))
        if rng.random() < 0.1:
            listing.half_spread_ticks = rng.randint(1, 3)
        listing.bid_qty = float(rng.randint(1, 40) * 100)
        listing.ask_qty = float(rng.randint(1, 40) * 100)
        msg.update(_quote_fields(listing))
    elif roll < 0.73:
        listing.bid_qty = float(rng.randint(0, 40) * 100)
        msg["bid_qty"] = listing.bid_qty
    else:
        listing.ask_qty = float(rng.randint(0, 40) * 100)
        msg["ask_qty"] = listing.ask_qty
    return msg


def _flow_trade(listing: _Listing, msg: dict[str, Any], cfg: SynthConfig, rng: random.Random) -> None:
    """A trade of the ``order_flow`` process (see the module docstring)."""
    buy = listing.last_buy if rng.random() < cfg.sign_persistence else not listing.last_buy
    listing.last_buy = buy
    qty = float(rng.choice((1, 5, 10, 25, 50, 100, 100, 200, 300, 500)))
    if rng.random() < cfg.midpoint_share:
        msg["trade_px"] = _px(listing, listing.mid_ticks)  # a midpoint match: the touch is untouched
        msg["trade_qty"] = qty
        return
    qty = _trade_at_touch(listing, msg, buy, qty)
    if rng.random() < cfg.impact_share:
        # The trade takes the touch and the quote moves its way, in the same message.
        step = 1 if buy else -1
        listing.mid_ticks = max(listing.half_spread_ticks + 5, listing.mid_ticks + step)
        listing.bid_qty = float(rng.randint(1, 40) * 100)
        listing.ask_qty = float(rng.randint(1, 40) * 100)
        msg.update(_quote_fields(listing))
    else:
        _consume_touch(listing, msg, buy, qty, rng)


def _trade_at_touch(listing: _Listing, msg: dict[str, Any], buy: bool, qty: float) -> float:
    """A trade at the touch (the ask for a buy), no larger than what rests there when
    anything does; returns its quantity."""
    side_qty = listing.ask_qty if buy else listing.bid_qty
    qty = min(qty, side_qty) if side_qty > 0 else qty
    px_ticks = listing.mid_ticks + (listing.half_spread_ticks if buy else -listing.half_spread_ticks)
    msg["trade_px"] = _px(listing, px_ticks)
    msg["trade_qty"] = qty
    return qty


def _consume_touch(listing: _Listing, msg: dict[str, Any], buy: bool, qty: float, rng: random.Random) -> None:
    """The trade consumes liquidity at the touch, in the same message (an emptied side is
    refilled)."""
    if buy:
        listing.ask_qty = max(0.0, listing.ask_qty - qty) or float(rng.randint(1, 30) * 100)
        msg["ask_qty"] = listing.ask_qty
    else:
        listing.bid_qty = max(0.0, listing.bid_qty - qty) or float(rng.randint(1, 30) * 100)
        msg["bid_qty"] = listing.bid_qty


def _ladder(listing: _Listing, levels: int, bid_side: bool) -> dict[float, float]:
    half = listing.half_spread_ticks
    out: dict[float, float] = {}
    for k in range(levels):
        ticks = listing.mid_ticks - half - k if bid_side else listing.mid_ticks + half + k
        if k == 0:
            qty = listing.bid_qty if bid_side else listing.ask_qty
        else:
            qty = float(100 * (1 + (ticks * 7 + k * 13) % 30))
        if qty > 0 and ticks > 0:
            out[_px(listing, ticks)] = qty
    return out


def _to_levels(listing: _Listing, msg: dict[str, Any], levels: int) -> None:
    """Replace the message's top-of-book fields by depth levels (see the module docstring)."""
    for key in ("bid_px", "bid_qty", "ask_px", "ask_qty"):
        msg.pop(key, None)
    bids, asks = _ladder(listing, levels, True), _ladder(listing, levels, False)
    if msg["kind"] == "snapshot" or listing.sent_bids is None or listing.sent_asks is None:
        msg["bids"] = [[px, qty] for px, qty in sorted(bids.items(), reverse=True)]
        msg["asks"] = [[px, qty] for px, qty in sorted(asks.items())]
    else:
        for key, new, old in (("bids", bids, listing.sent_bids), ("asks", asks, listing.sent_asks)):
            changed = [[px, qty] for px, qty in new.items() if old.get(px) != qty]
            changed += [[px, 0.0] for px in old if px not in new]
            if changed:
                msg[key] = changed
    listing.sent_bids, listing.sent_asks = bids, asks


def generate(cfg: SynthConfig) -> Iterator[dict[str, Any]]:
    """Yield ``cfg.messages`` tick maps in arrival order (valid ticks only)."""
    rng = random.Random(cfg.seed)
    listings = _listings(cfg, rng)
    # Min-heap of (arrival ns, event ns, index); each symbol's next event.
    pending: list[tuple[int, int, int]] = []
    clocks = [cfg.start_ns] * len(listings)

    def schedule(i: int) -> None:
        gap_ns = int(rng.expovariate(listings[i].rate_per_s) * 1e9) + 1
        clocks[i] += gap_ns
        arrival = max(listings[i].last_arrival_ns, clocks[i] + int(rng.random() * cfg.jitter_ms * 1e6))
        listings[i].last_arrival_ns = arrival
        heapq.heappush(pending, (arrival, clocks[i], i))

    for i in range(len(listings)):
        schedule(i)
    emitted = 0
    while emitted < cfg.messages:
        _, ts, i = heapq.heappop(pending)
        schedule(i)
        listing = listings[i]
        msg = _event(listing, ts, cfg, rng)
        if cfg.depth:
            _to_levels(listing, msg, cfg.depth)
        roll = rng.random()
        if roll < cfg.gap_rate and msg["kind"] == "delta":
            continue  # lost on the way: the receiver sees a sequence gap
        yield msg
        emitted += 1
        if roll > 1.0 - cfg.duplicate_rate and emitted < cfg.messages:
            yield dict(msg)  # sent twice
            emitted += 1


def _malformed_records(rng: random.Random, template: dict[str, Any]) -> list[bytes]:
    bad: list[Any] = [
        {**template, "ts": "yesterday"},
        {**template, "kind": "refresh"},
        {k: v for k, v in template.items() if k != "seq"},
        {**template, "trade_px": 10.5},
        {**template, "bid_px": -1.0},
        {**template, "ask_px": math.inf},
        ["not", "a", "tick"],
    ]
    out = [msgpack.packb(rec, use_bin_type=True) for rec in bad]
    out.append(b"\xc1\xc1 garbage that is not msgpack \xc1")
    rng.shuffle(out)
    return out


def feed_bytes(cfg: SynthConfig) -> Iterator[bytes]:
    """The encoded feed, record by record, with ``cfg.malformed`` bad records mixed in."""
    rng = random.Random(cfg.seed + 1)
    packer = msgpack.Packer(use_bin_type=True)
    positions = set(rng.sample(range(1, cfg.messages), min(cfg.malformed, max(0, cfg.messages - 1))))
    spare: list[bytes] = []
    for n, msg in enumerate(generate(cfg)):
        if n in positions:
            if not spare:
                spare = _malformed_records(rng, msg)
            yield spare.pop()
        yield packer.pack(msg)


def write_feed(path: Path, cfg: SynthConfig) -> int:
    """Write the feed to ``path`` (gzip when it ends in ``.gz``); returns the uncompressed size."""
    path.parent.mkdir(parents=True, exist_ok=True)
    written = 0
    with path.open("wb") as raw:
        handle: IO[bytes] = raw
        if path.suffix == ".gz":
            # mtime=0 and no file name keep the compressed bytes reproducible.
            handle = cast(IO[bytes], gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0, compresslevel=9))
        chunk: list[bytes] = []
        for record in feed_bytes(cfg):
            chunk.append(record)
            if len(chunk) >= 8192:
                written += handle.write(b"".join(chunk))
                chunk = []
        written += handle.write(b"".join(chunk))
        if handle is not raw:
            handle.close()
    return written
