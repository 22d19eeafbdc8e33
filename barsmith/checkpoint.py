"""Engine checkpoints: an engine's whole state as versioned bytes, and back.

A checkpoint holds everything an engine needs to continue as if it had never
stopped: per-symbol books and sequence positions, open and sealed bars, the
watermark, what has been closed, counters, and the caller's metadata (e.g. the
input offset it covers). Restoring it and feeding the rest of the stream gives
exactly the bars and books of an uninterrupted run (a property test pins this).

Format: one msgpack map ``{"format": "barsmith-engine-checkpoint", "version": N,
"specs": [...], "lateness_ns": L, "engine": {...}, "meta": {...}}``. A reader
accepts the versions it knows and refuses any other with a message telling the
operator what to do; it also refuses a checkpoint written with different bar specs
or lateness, because continuing from it would silently mix two definitions.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Final

import msgpack

from barsmith.bars.spec import BarSpec
from barsmith.engine import Engine
from barsmith.errors import CheckpointError, describe_error
from barsmith.ingest.eventtime import StreamLimits

FORMAT_NAME: Final = "barsmith-engine-checkpoint"
# 2: the event-time guard's state (held ticks); 1 is read as "nothing held".
FORMAT_VERSION: Final = 2
READABLE_VERSIONS: Final = frozenset({1, 2})

__all__ = ["FORMAT_VERSION", "CheckpointError", "decode_checkpoint", "encode_checkpoint"]


def encode_checkpoint(engine: Engine, meta: dict[str, Any] | None = None) -> bytes:
    """The engine's state as checkpoint bytes (take its bars and rejects first)."""
    payload = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "specs": [spec.text for spec in engine.specs],
        "lateness_ns": engine.lateness_ns,
        "engine": engine.to_state(),
        "meta": meta or {},
    }
    return bytes(msgpack.packb(payload, use_bin_type=True))


def decode_checkpoint(
    data: bytes, specs: Sequence[BarSpec], lateness_ns: int, limits: StreamLimits | None = None
) -> tuple[Engine, dict[str, Any]]:
    """Rebuild the engine stored in ``data``; raises :class:`CheckpointError` when the
    bytes are not a checkpoint, come from an unknown format version, or were written
    with other bar specs or lateness."""
    try:
        payload = msgpack.unpackb(data, raw=False, strict_map_key=False)
    except (msgpack.exceptions.UnpackException, ValueError) as exc:
        raise CheckpointError(f"not a barsmith checkpoint (undecodable: {exc})") from exc
    if not isinstance(payload, dict) or payload.get("format") != FORMAT_NAME:
        raise CheckpointError("not a barsmith checkpoint (no format marker)")
    version = payload.get("version")
    if version not in READABLE_VERSIONS:
        newer = isinstance(version, int) and version > FORMAT_VERSION
        advice = (
            "it was written by a newer barsmith: run that version, or start from scratch"
            if newer
            else "this barsmith no longer reads it: replay the input with the previous version, or start from scratch"
        )
        raise CheckpointError(
            f"checkpoint format version {version!r} is not readable (this barsmith reads "
            f"{sorted(READABLE_VERSIONS)}); {advice} (a new consumer group and state topic rebuild all state "
            "from the input)"
        )
    written_specs = list(payload.get("specs", []))
    wanted_specs = [spec.text for spec in specs]
    if written_specs != wanted_specs or payload.get("lateness_ns") != lateness_ns:
        raise CheckpointError(
            f"checkpoint was written for bars {written_specs} with lateness {payload.get('lateness_ns')} ns, "
            f"but the settings now say {wanted_specs} with {lateness_ns} ns; restore the old settings, or use a "
            "new consumer group and state topic to rebuild from the input"
        )
    try:
        engine = Engine.from_state(specs, lateness_ns, payload["engine"], limits)
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        raise CheckpointError(f"checkpoint is damaged: {describe_error(exc)}") from exc
    meta: dict[str, Any] = payload.get("meta", {})
    return engine, meta
