"""barsmith: streaming bar builder for tick feeds.

Data flows one way: a source (:mod:`barsmith.sources`) yields decoded records;
:mod:`barsmith.ingest` validates them into ticks; :mod:`barsmith.book` keeps each
symbol's book; :mod:`barsmith.bars` accumulates bars; :mod:`barsmith.engine` ties
these together per ordered stream; :mod:`barsmith.runner` owns the loop and hands
finished bars to the sinks (:mod:`barsmith.sinks`).
"""

import os

# barsmith does no linear algebra, but numpy (via pandas/pyarrow) starts OpenBLAS
# worker threads that spin on spare cores -- cores a co-located broker needs. One
# thread unless the user says otherwise; this must happen before numpy is imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from barsmith._version import __version__
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
