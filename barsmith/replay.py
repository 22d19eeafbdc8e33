"""``barsmith replay``: recorded files → the engine → Parquet, as a library call."""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path

from barsmith.runner import ProgressHook, Runner, RunSummary
from barsmith.settings import load_settings
from barsmith.sinks.parquet import ParquetBarSink, ParquetRejectSink, prepare_output_dir
from barsmith.sources.files import FileSource


def replay_files(
    files: Sequence[str | os.PathLike[str]],
    out_dir: str | os.PathLike[str],
    *,
    config_file: str | os.PathLike[str] | None = None,
    bars: Sequence[str] | None = None,
    lateness_ms: int | None = None,
    replace: bool = False,
    partitions: int = 1,
    progress: ProgressHook | None = None,
    flags: Mapping[str, str] | None = None,
) -> RunSummary:
    """Replay ``files`` (in order, as one stream) into Parquet under ``out_dir``.

    Bars go to ``<spec>-<n>.parquet`` files (``pandas.read_parquet(out_dir)`` reads
    them all) and rejected records to ``_rejects.parquet``. ``partitions > 1`` builds
    bars per bus partition, as the live service does. Raises
    :class:`~barsmith.errors.ConfigError` for bad settings, specs or paths (``flags``:
    the command-line flags that gave ``bars`` and ``lateness_ms``, by setting name, for
    its message; see :func:`~barsmith.settings.load_settings`).
    """
    settings = load_settings(
        config_file, flags=flags, bars=list(bars) if bars is not None else None, lateness_ms=lateness_ms
    )
    specs = settings.bar_specs()
    source = FileSource(files, partitions=partitions, max_record_bytes=settings.limits.max_record_bytes)
    out = Path(out_dir)
    prepare_output_dir(out, replace)
    pq_settings = settings.parquet
    sink = ParquetBarSink(
        out,
        specs,
        row_group_rows=pq_settings.row_group_rows,
        max_file_rows=pq_settings.max_file_rows,
        compression=pq_settings.compression,
        final_only=pq_settings.output_mode == "final",
    )
    runner = Runner(
        specs,
        settings.lateness_ns,
        source,
        [sink],
        ParquetRejectSink(out),
        progress,
        limits=settings.stream_limits(),
        revision_window_ns=settings.revision_window_ns,
    )
    return runner.run()
