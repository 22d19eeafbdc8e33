"""The defaults replay reads, for a start without the validation library.

:class:`barsmith.settings.Settings` is the one validated settings object. Building it
means importing pydantic and pydantic-settings, which takes longer than a whole replay
of a small file. When replay has no ``--config`` file and no ``BARSMITH_*`` variable
that names a setting, the settings can only be the defaults plus replay's flags, so
:func:`quick_replay_values` gives those values from the table below instead.

The table is a copy of ``Settings()``'s defaults: ``tests/test_settings.py`` builds
``Settings()`` and fails when an entry here differs from it, or when replay planned
from this table differs from replay planned from ``Settings`` (change a default there,
and the test names the entry to follow here). Anything unusual -- a value outside its
bounds, a spec that does not parse -- is left to the full path, so that error
messages come from one place.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Any, Final

# Outside the 9100-9999 range that Prometheus' list of exporter ports has filled, and
# away from the defaults of common exporters and client libraries (9464, 8000, 2112).
DEFAULT_METRICS_PORT: Final = 17365

# Bounds shared with the settings' declarations.
LATENESS_MS_MAX: Final = 3_600_000

# Settings()'s defaults that replay reads, by dotted name.
REPLAY_DEFAULTS: Final[Mapping[str, Any]] = {
    "bars": ["time:1m"],
    "bar_groups": ["core", "spread"],
    "lateness_ms": 2_000,
    "revision_window_ms": 0,
    "sessions.calendars_file": None,
    "sessions.outside": "drop",
    "event_time.max_jump_s": 3_600.0,
    "event_time.max_ahead_of_wall_s": 600.0,
    "event_time.max_behind_s": 300.0,
    "event_time.max_held_ticks": 10_000,
    "event_time.contradict_messages": 1_000,
    "limits.max_symbols": 200_000,
    "limits.max_record_bytes": 4 << 20,
    "limits.max_depth_levels": 1_000,
    "statistics.rv_sample_ms": 1_000,
    "statistics.depth_levels": 5,
    "parquet.row_group_rows": 4_096,
    "parquet.max_file_rows": 5_000_000,
    "parquet.compression": "zstd",
    "parquet.output_mode": "revisions",
}

# The settings' top-level names: a BARSMITH_<NAME> variable sets one of them.
TOP_LEVEL_SETTINGS: Final = frozenset(
    {
        "sessions",
        "bar_groups",
        "bars",
        "lateness_ms",
        "revision_window_ms",
        "parquet",
        "kafka",
        "metrics",
        "service",
        "checkpoint",
        "event_time",
        "limits",
        "statistics",
    }
)

_ENV_PREFIX: Final = "BARSMITH_"


def environment_sets_settings(environ: Mapping[str, str] | None = None) -> bool:
    """Whether a ``BARSMITH_*`` variable gives (or tries to give) a setting: nested
    ones (``__``) always do, or are a typo the full path reports; others only when
    they name a setting (the rest belong to barsmith's tools)."""
    for name in os.environ if environ is None else environ:
        upper = name.upper()
        if not upper.startswith(_ENV_PREFIX):
            continue
        rest = upper.removeprefix(_ENV_PREFIX)
        if "__" in rest or rest.lower() in TOP_LEVEL_SETTINGS:
            return True
    return False


def quick_replay_values(
    config_file: object | None, bars: list[str] | None, lateness_ms: int | None
) -> dict[str, Any] | None:
    """Replay's settings values (by dotted name) when they are the defaults plus these
    flags; ``None`` when the full settings must be built (a config file, a setting in
    the environment, or a flag value the full path should check and explain)."""
    if config_file is not None or environment_sets_settings():
        return None
    if lateness_ms is not None and not (type(lateness_ms) is int and 0 <= lateness_ms <= LATENESS_MS_MAX):
        return None
    if bars is not None and not all(type(text) is str for text in bars):
        return None
    values = dict(REPLAY_DEFAULTS)
    if bars is not None:
        values["bars"] = list(bars)
    if lateness_ms is not None:
        values["lateness_ms"] = lateness_ms
    return values
