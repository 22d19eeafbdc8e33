"""``barsmith show``: the bars of an output directory, for a quick look.

An output directory (of ``replay``, or of the service's Parquet sink) holds bar files
``*.parquet`` beside rejects (``_rejects*.parquet``) and, while a writer works, hidden
temporary files (``.``); only the bar files are read. Every problem is one line: a
directory without bar files, or a spec or symbol it does not hold, is a usage error
(:class:`~barsmith.errors.ConfigError`); a bar file that cannot be read is an
:class:`~barsmith.errors.InputError`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from barsmith.bars.columns import FRAME_HEAD, FRAME_TAIL
from barsmith.bars.core import CORE
from barsmith.errors import ConfigError, InputError, describe_error

_ORDER = ["start", "symbol", "spec"]
# What every bar file has: the frame and the core group (always carried).
_ALWAYS = [c.name for c in (*FRAME_HEAD, *CORE.columns, *FRAME_TAIL)]
_EXAMPLES = 8  # symbols named when one is not found


@dataclass(slots=True)
class ShownBars:
    """The bars selected for showing, in order of ``start``, then symbol and spec."""

    frame: Any  # pandas.DataFrame
    selected: int  # bars of the spec and symbol asked for
    hidden: int  # of those, bars without trades left out


def bar_files(directory: Path) -> list[Path]:
    """The bar files of an output directory (not rejects, not temporary files)."""
    if not directory.is_dir():
        raise ConfigError(f"not a directory: {directory}")
    files = sorted(p for p in directory.iterdir() if p.is_file() and _is_bar_file(p.name))
    if files:
        return files
    others = sorted(p.name for p in directory.iterdir() if not p.name.startswith("."))
    if not others:
        why = "it is empty"
    elif all(name.startswith("_") for name in others):
        why = f"only rejects: {', '.join(others[:3])}{' ...' if len(others) > 3 else ''}"
    else:
        why = f"{len(others)} other file(s), none a bar file (*.parquet)"
    raise ConfigError(f"no bar files in {directory} ({why})")


def _is_bar_file(name: str) -> bool:
    return name.endswith(".parquet") and not name.startswith(("_", "."))


def read_bars(files: list[Path]) -> Any:
    """All bars of ``files`` as one pandas frame, the Parquet columns and types."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    tables = []
    for path in files:
        try:
            table = pq.read_table(path)
        except (pa.ArrowException, OSError) as exc:
            raise InputError(f"cannot read bar file {path}: {describe_error(exc)}") from exc
        missing = [c for c in _ALWAYS if c not in table.column_names]
        if missing:
            raise InputError(f"{path} is not a bar file: no column {', '.join(missing[:3])}")
        tables.append(table)
    # Bar sets that carry other statistic groups have other columns: missing ones are null.
    return pa.concat_tables(tables, promote_options="default").to_pandas()


def select_bars(
    directory: Path, *, spec: str | None = None, symbol: str | None = None, with_trades_only: bool = True
) -> ShownBars:
    """The bars of ``directory`` for ``spec`` and ``symbol`` (None: all), without the
    bars that have no trade unless ``with_trades_only`` is false. A spec or symbol the
    directory does not hold is a :class:`ConfigError` naming what it does hold."""
    frame = read_bars(bar_files(directory))
    if spec is not None:
        if not (frame["spec"] == spec).any():
            specs = ", ".join(sorted(frame["spec"].unique()))
            raise ConfigError(f"no bars of spec {spec!r} in {directory}; its specs: {specs}")
        frame = frame[frame["spec"] == spec]
    if symbol is not None:
        if not (frame["symbol"] == symbol).any():
            symbols = sorted(frame["symbol"].unique())
            named = ", ".join(symbols[:_EXAMPLES]) + (" ..." if len(symbols) > _EXAMPLES else "")
            scope = f" of spec {spec!r}" if spec is not None else ""
            raise ConfigError(f"no bars of symbol {symbol!r}{scope} in {directory}; {len(symbols)} symbol(s): {named}")
        frame = frame[frame["symbol"] == symbol]
    selected = len(frame)
    if with_trades_only:
        frame = frame[frame["trades"] > 0]
    frame = frame.sort_values(_ORDER, kind="stable").reset_index(drop=True)
    return ShownBars(frame, selected, selected - len(frame))
