"""Engine checkpoints: an engine's whole state as versioned bytes, and back.

A checkpoint holds everything an engine needs to continue as if it had never
stopped: per-symbol books and sequence positions, open and sealed bars with their
statistic groups' accumulators, the families' per-symbol state, the event-time
guard's held ticks, the watermark, what has been closed, counters, and the caller's
metadata (e.g. the input offset it covers, and the sinks' state -- the Parquet sink's
carried bars among them). Restoring it and feeding the rest of the stream gives
exactly the bars and books of an uninterrupted run (a property test pins this).

Format: one msgpack map ``{"format": "barsmith-engine-checkpoint", "version": N,
"specs": [...], "layouts": [[spec, [groups]], ...], "lateness_ns": L, "engine": {...},
"meta": {...}}``. The version covers all of it, the carried bars included. A reader
accepts the versions it knows -- an older one is upgraded on reading -- and refuses
any other with a message telling the operator what to do; it also refuses a
checkpoint written with different bar specs, statistic groups or lateness, because
continuing from it would silently mix two definitions.

Versions: 1, the first (top-of-book bars with the ``core`` and ``spread`` columns,
positional); 2, every part serializing itself, the bar layouts, the event-time
guard, carried bars by spec with their column names; 3, the books' trade-sign
memory (last trade price, direction of its last change) and group labels with their
settings (``rv(1000ms)``). A version-2 checkpoint reads as version 3 with no trade
seen yet by the tick test. A spec written with a family keyword barsmith has since
renamed (``ticks:`` → ``trades:``, same rule) is read as the new spelling, so that a
service whose settings were updated continues its checkpoint.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Final

import msgpack

from barsmith.bars.family import NEVER
from barsmith.bars.spec import BAR_COLUMNS, DEFAULT_GROUPS, RENAMED, BarSpec
from barsmith.engine import Engine
from barsmith.errors import CheckpointError, describe_error
from barsmith.ingest.eventtime import UNCONFIRMED, StreamLimits

FORMAT_NAME: Final = "barsmith-engine-checkpoint"
FORMAT_VERSION: Final = 3
READABLE_VERSIONS: Final = frozenset({1, 2, 3})

__all__ = ["FORMAT_VERSION", "CheckpointError", "decode_checkpoint", "encode_checkpoint"]


def encode_checkpoint(engine: Engine, meta: dict[str, Any] | None = None) -> bytes:
    """The engine's state as checkpoint bytes (take its bars and rejects first)."""
    payload = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "specs": [spec.text for spec in engine.specs],
        "layouts": _layouts(engine.specs),
        "lateness_ns": engine.lateness_ns,
        "revision_window_ns": engine.revision_window_ns,
        "engine": engine.to_state(),
        "meta": meta or {},
    }
    return bytes(msgpack.packb(payload, use_bin_type=True))


def decode_checkpoint(
    data: bytes,
    specs: Sequence[BarSpec],
    lateness_ns: int,
    limits: StreamLimits | None = None,
    revision_window_ns: int = 0,
) -> tuple[Engine, dict[str, Any]]:
    """Rebuild the engine stored in ``data``; raises :class:`CheckpointError` when the
    bytes are not a checkpoint, come from an unknown format version, or were written
    with other bar specs, statistic groups or lateness."""
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
    _respell(payload)
    written_specs = list(payload.get("specs", []))
    written_layouts = payload.get("layouts") or [[text, list(DEFAULT_GROUPS)] for text in written_specs]
    wanted_specs = [spec.text for spec in specs]
    if (
        written_specs != wanted_specs
        or payload.get("lateness_ns") != lateness_ns
        or payload.get("revision_window_ns", 0) != revision_window_ns
        or [[t, list(g)] for t, g in written_layouts] != _layouts(specs)
    ):
        raise CheckpointError(
            f"checkpoint was written for bars {_describe(written_layouts)} with lateness "
            f"{payload.get('lateness_ns')} ns and revision window {payload.get('revision_window_ns', 0)} ns, but "
            f"the settings now say {_describe(_layouts(specs))} with {lateness_ns} ns and {revision_window_ns} ns; "
            "restore the old settings, or use a new consumer group and state topic to rebuild from the input"
        )
    try:
        if version == 1:
            _upgrade_from_1(payload, specs, limits or StreamLimits())
        engine = Engine.from_state(specs, lateness_ns, payload["engine"], limits, revision_window_ns)
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        raise CheckpointError(f"checkpoint is damaged: {describe_error(exc)}") from exc
    meta: dict[str, Any] = payload.get("meta", {})
    return engine, meta


def _respelled(text: str) -> str:
    """A spec text with a renamed family keyword written the new way."""
    keyword, sep, rest = text.partition(":")
    renamed = RENAMED.get(keyword.strip().lower())
    return f"{renamed[0]}{sep}{rest}" if sep and renamed is not None else text


def _respell(payload: dict[str, Any]) -> None:
    """Rewrite, in place, every spec text of the payload that uses a renamed family
    keyword: the specs and layouts, the engine's per-spec counters, and the spec of the
    bars a sink carries (their ``spec`` column included)."""
    texts = [str(text) for text in payload.get("specs", [])]
    new = {text: _respelled(text) for text in texts}
    if all(old == now for old, now in new.items()):
        return
    payload["specs"] = [new[text] for text in texts]
    if payload.get("layouts"):
        payload["layouts"] = [[new.get(str(text), text), groups] for text, groups in payload["layouts"]]
    engine = payload.get("engine")
    if isinstance(engine, dict):
        if isinstance(engine.get("stats"), list):
            # Engine.to_state's counters: from index 7 on, the per-spec ones (bars, outside).
            engine["stats"] = [
                {new.get(k, k): v for k, v in part.items()} if isinstance(part, dict) and i >= 7 else part
                for i, part in enumerate(engine["stats"])
            ]
        for item in engine.get("bars", []):
            if isinstance(item, dict) and "spec_text" in item:  # version 1
                item["spec_text"] = new.get(str(item["spec_text"]), item["spec_text"])
    for state in payload.get("meta", {}).get("sinks", {}).values():
        if not isinstance(state, dict):
            continue
        if isinstance(state.get("columns"), dict):
            state["columns"] = {new.get(k, k): v for k, v in state["columns"].items()}
        for row in state.get("bars", []) if isinstance(state.get("bars"), list) else []:
            if not isinstance(row, list) or len(row) < 2:
                continue
            if len(row) == 2 and isinstance(row[1], list):  # [spec, values]
                row[0] = new.get(row[0], row[0])
                row = row[1]
            if len(row) > 1 and row[1] in new:
                row[1] = new[row[1]]  # the bar's spec column (second, in every version)


def _layouts(specs: Sequence[BarSpec]) -> list[list[Any]]:
    return [[spec.text, spec.group_labels] for spec in specs]


def _describe(layouts: list[list[Any]]) -> str:
    return "[" + ", ".join(f"{text} ({'+'.join(groups)})" for text, groups in layouts) + "]"


# -- version 1 --------------------------------------------------------------------------


def _upgrade_from_1(payload: dict[str, Any], specs: Sequence[BarSpec], limits: StreamLimits) -> None:
    """Rewrite a version-1 payload in place into version 2's shape. Version 1 had the
    default groups only, no event-time guard (its watermark is confirmed time), and
    carried Parquet bars as positional rows of the default columns."""
    old = payload["engine"]
    index_of = {spec.text: i for i, spec in enumerate(specs)}
    bars = []
    for item in old["bars"]:
        index = index_of[str(item["spec_text"])]
        spec = specs[index]
        seal_at = int(item["end"]) if spec.is_time else NEVER
        progress = {"trades": float(item["trades"]), "volume": item["volume"], "notional": item["notional"]}
        closed = item.get("closed_book") or [None, None, None]
        core = [item[name] for name in ("open", "high", "low", "close", "volume", "notional", "trades")]
        spread = [item["spread_area"], item["spread_time"], item["spread_min"], item["spread_max"], item["open_spread"]]
        frame = [item["symbol"], item["start"], item["end"], seal_at, item["messages"], item["gaps"]]
        frame.append(0.0 if spec.is_time else progress[spec.family.keyword])
        frame.append([core, [*spread, *closed]])
        bars.append([index, frame])
    symbols = []
    for row in old["symbols"]:
        book = [row[1], row[2], row[3], row[4], row[5], row[6], row[7], row[8]]
        symbols.append([row[0], book, {"spread": [row[9], row[10]]}, [None] * len(specs), row[11]])
    watermark = int(old["watermark"])
    payload["engine"] = {
        **old,
        "bars": bars,
        "symbols": symbols,
        "horizon": watermark + limits.max_jump_ns if watermark else UNCONFIRMED,
        "guard": {"order": 0, "normal": 0, "last_normal": -1, "recent": [None, -1, None, -1], "held": []},
    }
    parquet = payload.get("meta", {}).get("sinks", {}).get("parquet")
    if isinstance(parquet, dict) and isinstance(parquet.get("bars"), list):
        parquet["columns"] = {str(row[1]): list(BAR_COLUMNS) for row in parquet["bars"]}
        parquet["bars"] = [[row[1], list(row)] for row in parquet["bars"]]
