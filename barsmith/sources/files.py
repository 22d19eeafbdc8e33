"""Recorded feed files (plain msgpack or framed recordings, either one optionally
gzip-compressed), read in the order given as one stream."""

from __future__ import annotations

import gzip
import os
import zlib
from collections.abc import AsyncIterator, Sequence
from pathlib import Path
from typing import IO, Any, Final, cast

from barsmith.errors import ConfigError, InputError
from barsmith.ingest.framing import DEFAULT_MAX_RECORD_BYTES, FrameReader, FramingReject
from barsmith.ingest.rejects import Reject
from barsmith.ingest.ticks import RejectReason
from barsmith.sources.base import RecordBatch, pause

GZIP_MAGIC: Final = b"\x1f\x8b"
# Small batches keep freshly decoded records in cache while the engine uses them.
BATCH_RECORDS: Final = 1_024
REPLAY_STREAM: Final = "replay"


def check_input_paths(paths: Sequence[str | os.PathLike[str]]) -> list[Path]:
    """Fail early, with one line, on a path that is missing or not a readable file."""
    if not paths:
        raise ConfigError("no input file given")
    checked: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if not path.is_file():
            raise ConfigError(f"input file not found: {path}")
        if not os.access(path, os.R_OK):
            raise ConfigError(f"input file not readable: {path}")
        checked.append(path)
    return checked


def open_feed(path: Path) -> tuple[IO[bytes], IO[bytes]]:
    """(decoded stream, raw file) — the raw file's position drives progress."""
    raw = path.open("rb")
    if raw.read(2) == GZIP_MAGIC:
        raw.seek(0)
        return cast(IO[bytes], gzip.GzipFile(fileobj=raw, mode="rb")), raw
    raw.seek(0)
    return raw, raw


class FileSource:
    """Replays recorded files as one ordered stream, then ends."""

    def __init__(
        self,
        paths: Sequence[str | os.PathLike[str]],
        batch_records: int = BATCH_RECORDS,
        partitions: int = 1,
        max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES,
    ) -> None:
        """``partitions > 1`` splits the stream by symbol the way the bus does (see
        :func:`barsmith.bus.topics.partition_for`): one ordered stream per partition. A
        record larger than ``max_record_bytes`` is rejected as ``too_large``."""
        if partitions < 1:
            raise ConfigError(f"partitions must be >= 1, got {partitions}")
        self.paths = check_input_paths(paths)
        self._partitions = partitions
        self._batch_records = batch_records
        self._max_record_bytes = max_record_bytes
        self._total_bytes = sum(p.stat().st_size for p in self.paths)
        self._done_bytes = 0
        self._stopped = False

    def progress(self) -> tuple[int, int] | None:
        return self._done_bytes, self._total_bytes

    def stop(self) -> None:
        self._stopped = True

    async def close(self) -> None:
        return None

    async def batches(self) -> AsyncIterator[RecordBatch]:
        finished_bytes = 0
        for path in self.paths:
            source = str(path)
            try:
                stream, raw = open_feed(path)
            except OSError as exc:
                raise InputError(f"cannot read {path}: {exc.strerror or exc}") from exc
            with raw, stream:
                reader = FrameReader(stream, max_record_bytes=self._max_record_bytes)
                while not reader.done:
                    if self._stopped:
                        return
                    try:
                        records, positions, framing = reader.read_batch(self._batch_records)
                    except (EOFError, zlib.error, gzip.BadGzipFile) as exc:
                        # A damaged compressed stream: report it as a truncation and go on
                        # with the next file; everything decoded so far was used.
                        yield _compressed_damage(path, exc)
                        break
                    except OSError as exc:
                        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from exc
                    self._done_bytes = finished_bytes + raw.tell()
                    if records or framing:
                        rejects = [_as_reject(source, f) for f in framing]
                        if self._partitions == 1:
                            yield RecordBatch(REPLAY_STREAM, source, records, positions, rejects)
                        else:
                            for batch in self._split(source, records, positions, rejects):
                                yield batch
                    # Let signal handlers and housekeeping run between batches.
                    await pause()
            finished_bytes += path.stat().st_size
            self._done_bytes = finished_bytes

    def _split(self, source: str, records: list[Any], positions: list[int], rejects: list[Reject]) -> list[RecordBatch]:
        # Here, not at the top: a replay of one stream never talks to the bus room.
        from barsmith.bus.topics import partition_for, symbol_of

        by_partition: dict[int, RecordBatch] = {}
        for record, position in zip(records, positions, strict=True):
            # A batched record is split per tick, as the publisher sends ticks.
            items = record if type(record) is list else [record]
            for item in items:
                partition = partition_for(symbol_of(item), self._partitions)
                batch = by_partition.get(partition)
                if batch is None:
                    batch = by_partition[partition] = RecordBatch(f"p{partition}", source, [], [])
                batch.records.append(item)
                batch.positions.append(position)
        if rejects:
            by_partition.setdefault(0, RecordBatch("p0", source, [], [])).rejects.extend(rejects)
        return [by_partition[p] for p in sorted(by_partition)]


def _as_reject(source: str, framing: FramingReject) -> Reject:
    return Reject(source, framing.offset, framing.reason, framing.detail, framing.raw)


def _compressed_damage(path: Path, exc: Exception) -> RecordBatch:
    reject = Reject(str(path), -1, RejectReason.TRUNCATED, f"compressed stream is damaged or cut short: {exc}", b"")
    return RecordBatch(REPLAY_STREAM, str(path), [], [], [reject])
