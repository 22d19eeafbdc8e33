"""Parquet output: bars to rolling files per spec, rejected records to ``_rejects*.parquet``.

Every file is written under a hidden temporary name (``.name.parquet.tmp``), fsynced
and renamed into place when complete, so a reader never sees a half-written file.
Readers skip names that start with ``.`` or ``_``: ``pandas.read_parquet(DIR)``
returns the bars alone, and the rejects sit beside them.
"""

from __future__ import annotations

import os
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Final

from barsmith.bars.columns import Column
from barsmith.bars.record import Bar
from barsmith.bars.spec import DEFAULT_COLUMNS, BarSpec
from barsmith.errors import ConfigError, SinkError
from barsmith.ingest.rejects import REJECT_COLUMNS, Reject
from barsmith.sinks.parquet_file import Field, ParquetFileWriter, check_compression

Schema = tuple[Field, ...]
"""A Parquet file's columns, in order."""


def bar_schema(columns: Sequence[Column]) -> Schema:
    """The Parquet columns of bars with ``columns`` (see :attr:`BarSpec.columns`): the
    column table's types, timestamps as ns since the epoch, adjusted to UTC (they read
    back as ``timestamp[ns, tz=UTC]``)."""
    return tuple(Field(c.name, c.kind, c.nullable) for c in columns)


BAR_SCHEMA: Final = bar_schema(DEFAULT_COLUMNS)
"""The schema of bars carrying the default groups."""

REJECT_SCHEMA: Final = (
    Field("source", "string", True),
    Field("position", "int64", True),
    Field("reason", "string", True),
    Field("detail", "string", True),
    Field("symbol", "string", True),
    Field("seq", "int64", True),
    Field("ts", "timestamp", True),
    Field("record", "binary", True),
)
assert tuple(f.name for f in REJECT_SCHEMA) == REJECT_COLUMNS


def _names(schema: Schema) -> tuple[str, ...]:
    return tuple(f.name for f in schema)


def bar_columns(bars: Sequence[Bar], schema: Schema = BAR_SCHEMA) -> list[Sequence[Any]]:
    """Bars of one spec as columns of ``schema`` (the spec's): one sequence of values each."""
    names = _names(schema)
    if bars and bars[0].names != names:
        raise SinkError(f"bars of {bars[0].spec} have columns {bars[0].names}, the file {names}")
    return list(zip(*(bar.values for bar in bars), strict=True)) if bars else [() for _ in names]


def reject_columns(rejects: Sequence[Reject]) -> list[Sequence[Any]]:
    """Rejected records as columns of :data:`REJECT_SCHEMA`."""
    rows = [r.as_row() for r in rejects]
    return [[row[name] for row in rows] for name in REJECT_COLUMNS]


def prepare_output_dir(path: Path, replace: bool) -> None:
    """Create ``path``; refuse one that already holds Parquet files unless ``replace``."""
    if path.exists() and not path.is_dir():
        raise ConfigError(f"output path exists and is not a directory: {path}")
    path.mkdir(parents=True, exist_ok=True)
    existing = sorted(p for p in path.iterdir() if p.name.endswith((".parquet", ".parquet.tmp")))
    if existing and not replace:
        raise ConfigError(f"output directory {path} already holds {len(existing)} Parquet file(s); use --replace")
    for old in existing:
        old.unlink()


def _temp_path(final_path: Path) -> Path:
    """Where a file is written before it is complete: hidden, beside its final name."""
    return final_path.with_name(f".{final_path.name}.tmp")


class _RollingFile:
    """One Parquet file being written under a temporary name."""

    def __init__(self, final_path: Path, schema: Schema, compression: str) -> None:
        self.final_path = final_path
        self.tmp_path = _temp_path(final_path)
        self.writer = ParquetFileWriter(self.tmp_path, schema, compression)
        self.opened_at = time.monotonic()

    @property
    def rows(self) -> int:
        return self.writer.rows

    def write(self, columns: Sequence[Sequence[Any]]) -> None:
        """One row group of ``columns``."""
        self.writer.write_row_group(columns)

    def finish(self) -> None:
        """Close the file and make it durable, still under its temporary name."""
        self.writer.close()
        with self.tmp_path.open("rb") as handle:
            os.fsync(handle.fileno())

    def commit(self) -> Path:
        self.finish()
        os.replace(self.tmp_path, self.final_path)
        _fsync_dir(self.final_path.parent)
        return self.final_path


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class ParquetBarSink:
    """Bars to ``DIR/<spec>-<n>.parquet``; a file rolls after ``max_file_rows`` rows or
    ``roll_interval_s`` seconds, whichever comes first."""

    name = "parquet"

    def __init__(
        self,
        directory: Path,
        specs: Sequence[BarSpec],
        *,
        row_group_rows: int = 4_096,
        max_file_rows: int = 5_000_000,
        roll_interval_s: float | None = None,
        compression: str = "zstd",
        file_prefix: str = "",
        final_only: bool = False,
    ) -> None:
        self.final_only = final_only  # with a revision window: final bars only
        self.directory = directory
        self._stems = {spec.text: spec.file_stem for spec in specs}
        self._schemas = {spec.text: bar_schema(spec.columns) for spec in specs}
        self._row_group_rows = row_group_rows
        self._max_file_rows = max_file_rows
        self._roll_interval_s = roll_interval_s
        self._compression = check_compression(compression)
        self._prefix = file_prefix
        self._pending: dict[str, list[Bar]] = {text: [] for text in self._stems}
        self._open: dict[str, _RollingFile] = {}
        self._counter: dict[str, int] = dict.fromkeys(self._stems, 0)
        self.files_written: list[Path] = []

    async def start(self) -> None:
        return None

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        for bar in bars:
            self._pending[bar.spec].append(bar)
        for text, pending in self._pending.items():
            if len(pending) >= self._row_group_rows:
                self._write(text)
        self._roll_old_files()

    async def flush(self) -> None:
        for text in self._pending:
            self._write(text)
        self._roll_old_files()

    async def close(self) -> None:
        await self.flush()
        for text in list(self._open):
            self._commit(text)

    def _write(self, text: str) -> None:
        pending = self._pending[text]
        if not pending:
            return
        self._pending[text] = []
        try:
            handle = self._open.get(text)
            if handle is None:
                self._counter[text] += 1
                name = f"{self._prefix}{self._stems[text]}-{self._counter[text]:06d}.parquet"
                handle = self._open[text] = _RollingFile(self.directory / name, self._schemas[text], self._compression)
            handle.write(bar_columns(pending, self._schemas[text]))
            if handle.rows >= self._max_file_rows:
                self._commit(text)
        except OSError as exc:
            raise SinkError(f"cannot write bars to {self.directory}: {exc}") from exc

    def _roll_old_files(self) -> None:
        if self._roll_interval_s is None:
            return
        now = time.monotonic()
        for text, handle in list(self._open.items()):
            if now - handle.opened_at >= self._roll_interval_s:
                self._commit(text)

    def _commit(self, text: str) -> None:
        handle = self._open.pop(text)
        try:
            self.files_written.append(handle.commit())
        except OSError as exc:
            raise SinkError(f"cannot finish {handle.final_path}: {exc}") from exc


class ParquetRejectSink:
    """Rejected records to ``DIR/_rejects.parquet`` (always written, possibly empty).

    Rejects are buffered into row groups of ``row_group_rows``: a flood of bad input
    would otherwise write one small row group per batch, and a Parquet writer keeps
    every row group's metadata in memory until the file is closed."""

    def __init__(self, directory: Path, file_name: str = "_rejects.parquet", row_group_rows: int = 16_384) -> None:
        self.path = directory / file_name
        self._file: _RollingFile | None = None
        self._pending: list[Reject] = []
        self._row_group_rows = row_group_rows
        self.count = 0

    async def write(self, rejects: Sequence[Reject]) -> None:
        self._pending.extend(rejects)
        self.count += len(rejects)
        if len(self._pending) >= self._row_group_rows:
            self._write_pending()

    def _write_pending(self) -> None:
        if self._file is None:
            self._file = _RollingFile(self.path, REJECT_SCHEMA, "zstd")
        if self._pending:
            self._file.write(reject_columns(self._pending))
            self._pending = []

    async def close(self) -> None:
        try:
            self._write_pending()
            self._file = self._file if self._file is not None else _RollingFile(self.path, REJECT_SCHEMA, "zstd")
            self._file.commit()
        except OSError as exc:
            raise SinkError(f"cannot finish {self.path}: {exc}") from exc


def carried_bars(bars: Sequence[Bar]) -> list[Any]:
    """Bars as plain data for a checkpoint: ``[spec, values]`` per bar, in order (the
    columns of each spec go beside them, see :func:`carried_columns`)."""
    return [[bar.spec, list(bar.values)] for bar in bars]


def carried_columns(bars: Sequence[Bar]) -> dict[str, list[str]]:
    """The column names of the carried bars, by spec (so that a restore can tell when a
    spec's columns changed)."""
    return {bar.spec: list(bar.names) for bar in bars}


def stream_file_tag(stream: str) -> str:
    """``ticks[3]`` → ``ticks.p3``: a stream name that is safe in a file name."""
    topic, bracket, rest = stream.partition("[")
    return f"{topic}.p{rest.rstrip(']')}" if bracket else stream


class _PartBuffer:
    """What one input partition produced since its last Parquet part."""

    __slots__ = ("bars", "from_offset", "opened_at", "rejects")

    def __init__(self, from_offset: int) -> None:
        self.bars: list[Bar] = []
        self.rejects: list[Reject] = []
        self.from_offset = from_offset
        self.opened_at = time.monotonic()


class ParquetPartSink:
    """Exactly-once Parquet output: each input partition's bars (and rejects) in parts
    that commit together with the partition's checkpoints.

    A part holds what the partition produced between two checkpoints' input offsets
    and is named after them, ``<spec>-<topic>.p<partition>-<from>-<to>.parquet``
    (rejects: ``_rejects-<topic>.p<partition>-<from>-<to>.parquet``), so a reader can
    tell which input every file covers. The checkpoint protocol, per partition:

    1. :meth:`prepare` — before the transaction: if a part is due (``roll_interval_s``
       since the last one, ``row_group_rows`` bars buffered, or ``final``), write it
       under hidden temporary names and fsync; otherwise return the buffered bars so
       that they travel inside the checkpoint. The result goes into the checkpoint.
    2. the transaction commits (bars on the bus, checkpoint, offsets);
    3. :meth:`committed` — rename the part into place.

    On assignment or after a failed transaction, :meth:`restore` applies the last
    committed checkpoint: it renames the parts it names (a crash between 2 and 3),
    deletes any other temporary part of that partition, and reloads the carried bars.
    """

    name = "parquet"

    def __init__(
        self,
        directory: Path,
        specs: Sequence[BarSpec],
        *,
        roll_interval_s: float,
        carry_max_rows: int = 4_096,
        compression: str = "zstd",
        keep_rejects: bool = True,
        final_only: bool = False,
    ) -> None:
        self.final_only = final_only  # with a revision window: final bars only
        self.directory = directory
        self._stems = {spec.text: spec.file_stem for spec in specs}
        self._schemas = {spec.text: bar_schema(spec.columns) for spec in specs}
        self._roll_interval_s = roll_interval_s
        self._carry_max_rows = carry_max_rows
        self._compression = check_compression(compression)
        self._keep_rejects = keep_rejects
        self._buffers: dict[str, _PartBuffer] = {}
        self.files_written: list[Path] = []

    # -- BarSink / RejectSink --------------------------------------------------------

    async def start(self) -> None:
        return None

    async def publish(self, stream: str, bars: Sequence[Bar]) -> None:
        self._buffer(stream).bars.extend(bars)

    async def write(self, rejects: Sequence[Reject]) -> None:
        if self._keep_rejects:
            for reject in rejects:
                self._buffer(reject.source).rejects.append(reject)

    async def flush(self) -> None:
        """Nothing: parts become durable through :meth:`prepare` and :meth:`committed`."""

    async def close(self) -> None:
        """Buffered bars not yet in a part live on in the last checkpoint."""

    # -- the checkpoint protocol ---------------------------------------------------------

    async def prepare(self, stream: str, offset: int, final: bool) -> dict[str, Any]:
        """Make the partition's output up to ``offset`` durable or carry it; the result
        belongs in the checkpoint."""
        buffer = self._buffer(stream)
        rows = len(buffer.bars) + len(buffer.rejects)
        due = final or len(buffer.bars) >= self._carry_max_rows or len(buffer.rejects) >= self._carry_max_rows
        due = due or (rows > 0 and time.monotonic() - buffer.opened_at >= self._roll_interval_s)
        if not due or rows == 0:
            return {
                "from": buffer.from_offset,
                "parts": [],
                "bars": carried_bars(buffer.bars),
                "columns": carried_columns(buffer.bars),
                "rejects": [list(r.as_row().values()) for r in buffer.rejects],
            }
        parts = []
        try:
            for text, bars in self._by_spec(buffer.bars).items():
                name = f"{self._stems[text]}-{stream_file_tag(stream)}-{buffer.from_offset:012d}-{offset:012d}.parquet"
                parts.append(self._write_temp(name, self._schemas[text], bar_columns(bars, self._schemas[text])))
            if buffer.rejects:
                name = f"_rejects-{stream_file_tag(stream)}-{buffer.from_offset:012d}-{offset:012d}.parquet"
                parts.append(self._write_temp(name, REJECT_SCHEMA, reject_columns(buffer.rejects)))
        except OSError as exc:
            raise SinkError(f"cannot write bars to {self.directory}: {exc}") from exc
        return {"from": offset, "parts": parts, "bars": [], "rejects": []}

    async def committed(self, stream: str, state: dict[str, Any]) -> None:
        """The checkpoint holding ``state`` committed: publish its parts."""
        if state["parts"]:
            self._publish_parts(state["parts"])
            # A fresh, empty buffer starting at the checkpoint's offset.
            self._buffers[stream] = _PartBuffer(int(state["from"]))

    async def restore(self, stream: str, state: dict[str, Any] | None, offset: int) -> None:
        """Continue ``stream`` from its last committed checkpoint's ``state`` (None: from
        scratch at ``offset``)."""
        keep = set(state["parts"]) if state else set()
        tag = stream_file_tag(stream)
        for path in self.directory.glob(f".*-{tag}-*.parquet.tmp"):
            final_name = path.name[1 : -len(".tmp")]
            if final_name in keep:
                continue
            if final_name.partition(f"-{tag}-")[0] in {*self._stems.values(), "_rejects"}:
                path.unlink(missing_ok=True)  # written for a checkpoint that never committed
        if state is None:
            self._buffers[stream] = _PartBuffer(offset)
            return
        self._publish_parts(state["parts"])
        buffer = self._buffers[stream] = _PartBuffer(int(state["from"]))
        buffer.bars = self._carried(state["bars"], state.get("columns", {}))
        buffer.rejects = [Reject.from_row(dict(zip(REJECT_COLUMNS, row, strict=True))) for row in state["rejects"]]

    def release(self, stream: str) -> None:
        """The partition went to another owner, which continues from its checkpoint."""
        self._buffers.pop(stream, None)

    # -- internals ---------------------------------------------------------------------

    def _buffer(self, stream: str) -> _PartBuffer:
        buffer = self._buffers.get(stream)
        if buffer is None:
            buffer = self._buffers[stream] = _PartBuffer(0)
        return buffer

    def _carried(self, rows: list[Any], columns: dict[str, list[str]]) -> list[Bar]:
        """Inverse of :func:`carried_bars`; refuses bars whose columns are not the ones
        their spec carries now (the checkpoint would otherwise mix two definitions)."""
        names: dict[str, tuple[str, ...]] = {}
        for text, written in columns.items():
            wanted = self._schemas.get(text)
            if wanted is None or tuple(written) != _names(wanted):
                raise SinkError(
                    f"the checkpoint carries bars of {text} with other columns than this spec has now; restore the old "
                    "settings, or use a new consumer group and state topic to rebuild from the input"
                )
            names[text] = tuple(written)
        return [Bar(names[text], values) for text, values in rows]

    def _by_spec(self, bars: Sequence[Bar]) -> dict[str, list[Bar]]:
        grouped: dict[str, list[Bar]] = {}
        for bar in bars:
            grouped.setdefault(bar.spec, []).append(bar)
        return grouped

    def _write_temp(self, name: str, schema: Schema, columns: Sequence[Sequence[Any]]) -> str:
        handle = _RollingFile(self.directory / name, schema, self._compression)
        handle.write(columns)
        handle.finish()  # renamed by _publish_parts once the checkpoint naming it commits
        return name

    def _publish_parts(self, names: Sequence[str]) -> None:
        for name in names:
            final = self.directory / name
            temp = _temp_path(final)
            try:
                if temp.exists():
                    os.replace(temp, final)
                    self.files_written.append(final)
                elif not final.exists():
                    raise SinkError(f"checkpointed Parquet part {name} is missing from {self.directory}")
            except OSError as exc:
                raise SinkError(f"cannot finish {final}: {exc}") from exc
        if names:
            _fsync_dir(self.directory)
