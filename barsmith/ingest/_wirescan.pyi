"""Types of the C record scanner (barsmith/ingest/_wirescan.c)."""

from typing import Final

from barsmith.ingest.ticks import Tick

NOT_SIMPLE: Final[int]
INCOMPLETE: Final[int]

class WireScanner:
    """Scans one record at a time. After a successful scan, ``tick`` (or ``batch``) holds it."""

    @property
    def tick(self) -> Tick | None: ...
    @property
    def batch(self) -> list[Tick] | None: ...
    def scan_record(self, data: bytes, pos: int, /) -> int: ...
    def scan_records(
        self,
        data: bytes,
        pos: int,
        count: int,
        max_bytes: int,
        base: int,
        records: list[object],
        positions: list[int],
        /,
    ) -> tuple[int, int, int]: ...
    def scan_value(self, value: bytes, /) -> Tick | list[Tick] | None: ...
