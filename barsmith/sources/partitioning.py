"""Which partition a symbol's ticks live in: the same rule the Kafka producer uses.

``barsmith publish`` places each tick with :func:`partition_for`, and
``barsmith replay --partitions N`` splits a recorded feed with it, so that a replay
builds exactly the bars the live service builds from the bus (one engine, and one
watermark, per partition).
"""

from __future__ import annotations

import functools
from typing import Any

from barsmith.ingest.ticks import Tick


@functools.lru_cache(maxsize=65_536)
def partition_for(symbol: str | None, partitions: int) -> int:
    """murmur2 of the UTF-8 key, as Kafka's default partitioner; records without a
    symbol go to partition 0."""
    if symbol is None or partitions <= 1:
        return 0
    from aiokafka.partitioner import murmur2

    hashed: int = murmur2(symbol.encode("utf-8"))
    return (hashed & 0x7FFFFFFF) % partitions


def symbol_of(record: Any) -> str | None:
    """The ``sym`` of a decoded record (the first tick's, for a batch), if it has one."""
    if type(record) is Tick:
        return record.sym
    if type(record) is list:
        return symbol_of(record[0]) if record else None
    if type(record) is dict:
        sym = record.get("sym")
        return sym if type(sym) is str else None
    return None
