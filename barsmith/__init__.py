"""barsmith: streaming bar builder for tick feeds.

Data flows one way: a source (:mod:`barsmith.sources`) yields decoded records;
:mod:`barsmith.ingest` validates them into ticks; :mod:`barsmith.book` keeps each
symbol's book; :mod:`barsmith.bars` accumulates bars; :mod:`barsmith.engine` ties
these together per ordered stream; :mod:`barsmith.runner` owns the loop and hands
finished bars to the sinks (:mod:`barsmith.sinks`).

The public names below are imported on first use: ``import barsmith`` (and so every
command) starts without the engine, the settings library, pyarrow or pandas, and
each command loads only the parts it runs.
"""

from __future__ import annotations

import importlib
import os
from typing import TYPE_CHECKING, Any

# barsmith does no linear algebra, but numpy (via pandas/pyarrow) starts OpenBLAS
# worker threads that spin on spare cores -- cores a co-located broker needs. One
# thread unless the user says otherwise; this must happen before numpy is imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from barsmith._version import __version__

if TYPE_CHECKING:
    from barsmith.bars.record import Bar
    from barsmith.bars.spec import BAR_COLUMNS, BarKind, BarSpec, parse_specs
    from barsmith.book.book import BookStatus, Outcome, SymbolBook
    from barsmith.checkpoint import decode_checkpoint, encode_checkpoint
    from barsmith.engine import Engine, EngineStats
    from barsmith.errors import (
        BarsmithError,
        BarSpecError,
        CheckpointError,
        ConfigError,
        InputError,
        SinkError,
        StateError,
    )
    from barsmith.ingest.rejects import Reject
    from barsmith.ingest.ticks import MalformedTickError, RejectReason, Tick, decode_tick
    from barsmith.readback import read_bars
    from barsmith.replay import replay_files
    from barsmith.runner import Runner, RunSummary
    from barsmith.settings import Settings, load_settings

# Where each public name lives (the module is imported when the name is first used).
_HOMES: dict[str, str] = {
    "Bar": "barsmith.bars.record",
    "BAR_COLUMNS": "barsmith.bars.spec",
    "BarKind": "barsmith.bars.spec",
    "BarSpec": "barsmith.bars.spec",
    "parse_specs": "barsmith.bars.spec",
    "BookStatus": "barsmith.book.book",
    "Outcome": "barsmith.book.book",
    "SymbolBook": "barsmith.book.book",
    "decode_checkpoint": "barsmith.checkpoint",
    "encode_checkpoint": "barsmith.checkpoint",
    "Engine": "barsmith.engine",
    "EngineStats": "barsmith.engine",
    "BarsmithError": "barsmith.errors",
    "BarSpecError": "barsmith.errors",
    "CheckpointError": "barsmith.errors",
    "ConfigError": "barsmith.errors",
    "InputError": "barsmith.errors",
    "SinkError": "barsmith.errors",
    "StateError": "barsmith.errors",
    "Reject": "barsmith.ingest.rejects",
    "MalformedTickError": "barsmith.ingest.ticks",
    "RejectReason": "barsmith.ingest.ticks",
    "Tick": "barsmith.ingest.ticks",
    "decode_tick": "barsmith.ingest.ticks",
    "read_bars": "barsmith.readback",
    "replay_files": "barsmith.replay",
    "Runner": "barsmith.runner",
    "RunSummary": "barsmith.runner",
    "Settings": "barsmith.settings",
    "load_settings": "barsmith.settings",
}


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'barsmith' has no attribute {name!r}")
    value = getattr(importlib.import_module(home), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})


__all__ = [
    "BAR_COLUMNS",
    "Bar",
    "BarKind",
    "BarSpec",
    "BarSpecError",
    "BarsmithError",
    "BookStatus",
    "CheckpointError",
    "ConfigError",
    "Engine",
    "EngineStats",
    "InputError",
    "MalformedTickError",
    "Outcome",
    "Reject",
    "RejectReason",
    "RunSummary",
    "Runner",
    "Settings",
    "SinkError",
    "StateError",
    "SymbolBook",
    "Tick",
    "__version__",
    "decode_checkpoint",
    "decode_tick",
    "encode_checkpoint",
    "load_settings",
    "parse_specs",
    "read_bars",
    "replay_files",
]
