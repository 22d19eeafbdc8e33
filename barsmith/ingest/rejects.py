"""A record that was not used for bars, kept so that nothing valid is silently lost."""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Final

import msgpack

from barsmith.ingest.ticks import RejectReason, Tick

REJECT_COLUMNS: Final[tuple[str, ...]] = (
    "source",
    "position",
    "reason",
    "detail",
    "symbol",
    "seq",
    "ts",
    "record",
)


@dataclass(slots=True)
class Reject:
    """One rejected record: where it was (file path and byte offset, or topic/partition
    and Kafka offset), why, and its bytes (msgpack) so that it can be replayed."""

    source: str
    position: int
    reason: RejectReason
    detail: str
    record: bytes
    symbol: str | None = None
    seq: int | None = None
    ts: int | None = None

    def as_row(self) -> dict[str, Any]:
        row = {f.name: getattr(self, f.name) for f in fields(self)}
        row["reason"] = self.reason.value
        return {name: row[name] for name in REJECT_COLUMNS}

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> Reject:
        """Inverse of :meth:`as_row`."""
        return cls(**{**row, "reason": RejectReason(row["reason"]), "record": bytes(row["record"])})


def pack_record(obj: Any) -> bytes:
    """Re-encode a decoded record for the rejects file (best effort, never raises)."""
    if isinstance(obj, Tick):
        obj = obj.to_wire()
    try:
        return bytes(msgpack.packb(obj, use_bin_type=True))
    except (TypeError, ValueError, OverflowError):
        return repr(obj).encode("utf-8", "replace")
