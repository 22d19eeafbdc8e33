"""A seeded generator of damaged feeds: a valid synthetic feed with hostile byte spans
and malformed msgpack values put between its records.

Every insertion sits *between* records, so every valid record is intact and must be
recovered. The kinds of insertion are aimed at the recovery rules' edges: random
bytes, container headers (which could swallow the records after them), prefixes of
valid records, bogus huge length headers, single bytes, and well-formed values that
are not valid ticks.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass, field
from typing import Any

import msgpack

from barsmith.ingest.ticks import MalformedTickError, decode_tick
from barsmith.tools.synth import SynthConfig, generate

CONTAINER_HEADERS = [*range(0x80, 0xA0), 0xDC, 0xDD, 0xDE, 0xDF]
KINDS = ("random", "container", "prefix", "huge_header", "single_byte", "value")
WEIGHTS = (30, 20, 15, 5, 5, 25)


@dataclass
class HostileFeed:
    data: bytes
    records: list[bytes]  # the valid records, in order
    offsets: list[int]  # where each valid record starts in data
    spans: list[tuple[int, int, str]] = field(default_factory=list)  # (start, end, kind) of each insertion

    @property
    def valid_ticks(self) -> list[dict[str, Any]]:
        out: list[dict[str, Any]] = []
        for record in self.records:
            value = msgpack.unpackb(record)
            out.extend(value if isinstance(value, list) else [value])
        return out


def valid_records(seed: int, messages: int, batch_share: float = 0.04) -> list[bytes]:
    """A synthetic feed packed record by record; a few runs of ticks become batches."""
    rng = random.Random(seed)
    ticks = list(generate(SynthConfig(seed=seed, symbols=12, messages=messages, duration_s=messages / 50)))
    out: list[bytes] = []
    i = 0
    while i < len(ticks):
        if rng.random() < batch_share:
            n = rng.randint(2, 12)
            out.append(msgpack.packb(ticks[i : i + n]))
            i += n
        else:
            out.append(msgpack.packb(ticks[i]))
            i += 1
    return out


def hostile_bytes(rng: random.Random, kind: str, records: list[bytes]) -> bytes:
    if kind == "random":
        return rng.randbytes(rng.randint(1, 64))
    if kind == "single_byte":
        return bytes([rng.randrange(256)])
    if kind == "container":
        head = rng.choice(CONTAINER_HEADERS)
        count = b""
        if head in (0xDC, 0xDE):
            count = rng.randrange(1 << 16).to_bytes(2, "big")
        elif head in (0xDD, 0xDF):
            count = rng.choice([rng.randrange(1 << 32), 0xFFFFFFFF, 1 << 20]).to_bytes(4, "big")
        return bytes([head]) + count + rng.randbytes(rng.randint(0, 16))
    if kind == "prefix":
        record = rng.choice(records)
        while record[0] >= 0x90:  # a batch's prefix would hold whole records
            record = rng.choice(records)
        return record[: rng.randint(1, len(record) - 1)] + rng.randbytes(rng.choice([0, 0, rng.randint(1, 8)]))
    if kind == "huge_header":
        head = rng.choice([0xDB, 0xC6, 0xC9, 0xDD, 0xDF])
        size = rng.choice([200 * 1024 * 1024, 0xFFFFFFFF, 5 * 1024 * 1024])
        return bytes([head]) + size.to_bytes(4, "big") + rng.randbytes(rng.randint(0, 8))
    if kind == "value":
        return msgpack.packb(hostile_value(rng), use_bin_type=True)
    raise ValueError(kind)


def hostile_value(rng: random.Random) -> Any:
    """A well-formed msgpack value that is not a valid tick (nor a batch of them)."""
    base: dict[str, Any] = {"sym": "JUNK~KESMOOR", "ts": 1, "seq": 1, "kind": "delta"}
    dropped = rng.choice(list(base))
    choices: list[Any] = [
        {**base, "ts": "yesterday"},
        {**base, "ts": -5},
        {**base, "ts": 2**64 - 1},
        {**base, "seq": 1.5},
        {**base, "kind": "refresh"},
        {**base, "bid_px": math.nan},
        {**base, "ask_px": -math.inf},
        {**base, "trade_px": 10.0},
        {**base, "sym": "X" * rng.randint(65, 5000)},
        {**base, "bid_qty": msgpack.ExtType(5, b"\x00\x01")},
        {k: v for k, v in base.items() if k != dropped},
        {},
        {"nested": [[[[{"deep": [1, 2, {"a": "b"}]}]]]]},
        rng.randint(-(2**63), 2**64 - 1),
        rng.random(),
        "a string that is not a tick",
        rng.randbytes(rng.randint(0, 40)),
        None,
        True,
        [1, 2, 3],
        [],
        [{**base, "seq": -1}, 5],
        msgpack.ExtType(rng.randrange(128), rng.randbytes(rng.randint(0, 20))),
    ]
    value = rng.choice(choices)
    if isinstance(value, dict):
        try:
            decode_tick(value)
        except MalformedTickError:
            return value
        raise AssertionError(f"hostile value is a valid tick: {value!r}")
    return value


def _array_header_bytes(record: bytes) -> int:
    head = record[0]
    return 1 if 0x90 <= head <= 0x9F else 3 if head == 0xDC else 5 if head == 0xDD else 0


def holds_a_tick(junk: bytes) -> bool:
    """Whether a valid tick map decodes entirely inside ``junk`` (then it is not junk)."""
    for at, byte in enumerate(junk):
        if not (0x80 <= byte <= 0x8F or byte in (0xDE, 0xDF)):
            continue
        unpacker = msgpack.Unpacker(raw=False, strict_map_key=False)
        unpacker.feed(junk[at:])
        try:
            value = unpacker.unpack()
            decode_tick(value)
        except (msgpack.OutOfData, ValueError, TypeError, msgpack.UnpackException, MalformedTickError):
            continue
        return True
    return False


def hostile_feed(seed: int, messages: int, insertions: int, truncated_tail: bool = True) -> HostileFeed:
    """``messages`` valid ticks with ``insertions`` hostile insertions between records
    (several may share a gap, then they form one span)."""
    rng = random.Random(seed * 7919 + 1)
    records = valid_records(seed, messages)
    gaps: dict[int, list[bytes]] = {}
    for _ in range(insertions):
        gap = rng.randrange(len(records) + 1)
        # A tick that ends on a batch header after the gap is inseparable from a
        # tick and a batch: bytes that parse completely hold no damage to find.
        after = records[gap][: _array_header_bytes(records[gap])] if gap < len(records) else b""
        for attempt in range(100):
            kind = rng.choices(KINDS, WEIGHTS)[0]
            junk = hostile_bytes(rng, kind, records)
            if attempt >= 3:
                gaps.pop(gap, None)  # what is already there may complete into a tick with anything
            if not holds_a_tick(b"".join(gaps.get(gap, [])) + junk + after):
                gaps.setdefault(gap, []).append(junk)
                break
    parts: list[bytes] = []
    offsets: list[int] = []
    spans: list[tuple[int, int, str]] = []
    at = 0
    for i in range(len(records) + 1):
        for junk in gaps.get(i, []):
            parts.append(junk)
            spans.append((at, at + len(junk), "junk"))
            at += len(junk)
        if i < len(records):
            offsets.append(at)
            parts.append(records[i])
            at += len(records[i])
    if truncated_tail:
        cut = records[0][: len(records[0]) // 2]
        parts.append(cut)
        spans.append((at, at + len(cut), "tail"))
    return HostileFeed(b"".join(parts), records, offsets, spans)
