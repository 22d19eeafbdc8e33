"""The fast decoder of the usual record: msgpack bytes → :class:`Tick` objects.

Decoding a map with msgpack builds a dict, key strings and float objects, and the
validator then reads them back. For the usual message — a map whose keys are the
wire format's own, with string, integer, float or nil values (depth levels: up to 15
``[px, qty]`` number pairs a side), alone or in an array (a batched record) — the
scanner in ``_wirescan.c`` reads the bytes once and builds the ticks directly. It is
C because it runs once per tick and sets the service's throughput.

It accepts a record only when every field passes exactly the checks of
:func:`barsmith.ingest.ticks.decode_tick`; anything else (an unknown key, an
unusual encoding, a bad value) makes it answer ``NOT_SIMPLE`` (or ``None`` from
``scan_value``), and the caller decodes that record the general way, which gives
the same answer and a precise reject reason. So the fast path can only be faster,
never different (a property test pins this).

A build without compiling (``BARSMITH_PURE_PYTHON=1``) has no scanner:
:func:`new_scanner` returns ``None`` and every record takes the general path.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Final

if TYPE_CHECKING:
    from barsmith.ingest._wirescan import WireScanner

NOT_SIMPLE: Final = -1  # decode this record the general way
INCOMPLETE: Final = -2  # the record runs past the end of the buffer


def new_scanner() -> WireScanner | None:
    """A record scanner, or ``None`` when the C extension was not built."""
    try:
        from barsmith.ingest._wirescan import WireScanner
    except ImportError:
        return None
    return WireScanner()
