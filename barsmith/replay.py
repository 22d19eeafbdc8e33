"""``barsmith replay``: recorded files → the engine → Parquet, as a library call."""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from barsmith._quick_settings import quick_replay_values
from barsmith.bars.family import SpecContext
from barsmith.bars.group import StatOptions
from barsmith.bars.spec import BarSpec, parse_specs
from barsmith.errors import BarsmithError
from barsmith.ingest.eventtime import StreamLimits
from barsmith.runner import ProgressHook, Runner, RunSummary
from barsmith.sinks.parquet import ParquetBarSink, ParquetRejectSink, prepare_output_dir
from barsmith.sources.files import FileSource

if TYPE_CHECKING:
    from barsmith.settings import Settings


@dataclasses.dataclass(frozen=True, slots=True)
class ReplayPlan:
    """What replay takes from the settings."""

    specs: tuple[BarSpec, ...]
    lateness_ns: int
    revision_window_ns: int
    limits: StreamLimits
    max_record_bytes: int
    row_group_rows: int
    max_file_rows: int
    compression: str
    final_only: bool

    @classmethod
    def from_settings(cls, settings: Settings) -> ReplayPlan:
        """The plan of validated settings (the one source of truth)."""
        parquet = settings.parquet
        return cls(
            specs=tuple(settings.bar_specs()),
            lateness_ns=settings.lateness_ns,
            revision_window_ns=settings.revision_window_ns,
            limits=settings.stream_limits(),
            max_record_bytes=settings.limits.max_record_bytes,
            row_group_rows=parquet.row_group_rows,
            max_file_rows=parquet.max_file_rows,
            compression=parquet.compression,
            final_only=parquet.output_mode == "final",
        )

    @classmethod
    def from_defaults(cls, values: Mapping[str, Any]) -> ReplayPlan:
        """The plan of the defaults plus flags (:func:`~barsmith._quick_settings.quick_replay_values`);
        the same as :meth:`from_settings` of ``Settings`` built from them (a test checks)."""
        statistics = StatOptions(
            rv_sample_ns=values["statistics.rv_sample_ms"] * 1_000_000, depth_levels=values["statistics.depth_levels"]
        )
        context = SpecContext(
            None, values["sessions.outside"], revisions=values["revision_window_ms"] > 0, statistics=statistics
        )
        ahead = values["event_time.max_ahead_of_wall_s"]
        return cls(
            specs=tuple(parse_specs(values["bars"], values["bar_groups"], context)),
            lateness_ns=values["lateness_ms"] * 1_000_000,
            revision_window_ns=values["revision_window_ms"] * 1_000_000,
            limits=StreamLimits(
                max_jump_ns=_ns(values["event_time.max_jump_s"]),
                max_ahead_of_wall_ns=_ns(ahead) if ahead is not None else None,
                max_behind_ns=_ns(values["event_time.max_behind_s"]),
                max_held=values["event_time.max_held_ticks"],
                contradict_messages=values["event_time.contradict_messages"],
                max_symbols=values["limits.max_symbols"],
                max_depth_levels=values["limits.max_depth_levels"],
            ),
            max_record_bytes=values["limits.max_record_bytes"],
            row_group_rows=values["parquet.row_group_rows"],
            max_file_rows=values["parquet.max_file_rows"],
            compression=values["parquet.compression"],
            final_only=values["parquet.output_mode"] == "final",
        )


def _ns(seconds: float) -> int:
    return round(seconds * 1e9)


def plan_replay(
    config_file: str | os.PathLike[str] | None = None,
    *,
    bars: Sequence[str] | None = None,
    lateness_ms: int | None = None,
    flags: Mapping[str, str] | None = None,
) -> ReplayPlan:
    """Replay's settings: from the defaults and flags when nothing else can apply (no
    config file, no setting in the environment), otherwise from
    :func:`~barsmith.settings.load_settings`. A problem always goes to the full path,
    which raises :class:`~barsmith.errors.ConfigError` with the settings' own message."""
    listed = list(bars) if bars is not None else None
    values = quick_replay_values(config_file, listed, lateness_ms)
    if values is not None:
        try:
            return ReplayPlan.from_defaults(values)
        except BarsmithError:
            pass  # the full path says what is wrong, naming the flag
    from barsmith.settings import load_settings

    settings = load_settings(config_file, flags=flags, bars=listed, lateness_ms=lateness_ms)
    return ReplayPlan.from_settings(settings)


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
    plan = plan_replay(config_file, bars=bars, lateness_ms=lateness_ms, flags=flags)
    source = FileSource(files, partitions=partitions, max_record_bytes=plan.max_record_bytes)
    out = Path(out_dir)
    prepare_output_dir(out, replace)
    sink = ParquetBarSink(
        out,
        plan.specs,
        row_group_rows=plan.row_group_rows,
        max_file_rows=plan.max_file_rows,
        compression=plan.compression,
        final_only=plan.final_only,
    )
    runner = Runner(
        plan.specs,
        plan.lateness_ns,
        source,
        [sink],
        ParquetRejectSink(out),
        progress,
        limits=plan.limits,
        revision_window_ns=plan.revision_window_ns,
    )
    # Files and Parquet never wait on I/O: no event loop to import and start.
    return runner.run(event_loop=False)
