"""Reading barsmith's Parquet output back: :func:`read_bars`.

A directory written by ``barsmith replay`` or the service's Parquet sink holds bar
files of each spec beside rejects (``_rejects*``) and, while a writer works, hidden
temporary files. With a revision window, a corrected bar is appended as a new row
with ``revision`` one higher; :func:`read_bars` returns the latest revision of each
bar, as a pandas frame.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from barsmith.errors import ConfigError, InputError


def read_bars(directory: str | os.PathLike[str], *, revisions: bool = False) -> Any:
    """Every bar under ``directory`` as a ``pandas.DataFrame`` -- the latest revision of
    each (``revisions=True``: every revision). Bar sets with other columns are read
    together; a column a set lacks is null for its rows."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    root = Path(directory)
    if not root.is_dir():
        raise ConfigError(f"not a directory: {root}")
    files = sorted(p for p in root.iterdir() if p.name.endswith(".parquet") and not p.name.startswith(("_", ".")))
    if not files:
        raise ConfigError(f"no bar files in {root}")
    tables = []
    for path in files:
        try:
            tables.append(pq.read_table(path))
        except (pa.ArrowException, OSError) as exc:
            raise InputError(f"cannot read bar file {path}: {exc}") from exc
    frame = pa.concat_tables(tables, promote_options="default").to_pandas()
    if revisions or "revision" not in frame.columns:
        return frame
    # Within one bar's key, the highest revision is the bar; event bars are never
    # revised (all 0), so several event bars sharing a start all stay.
    latest = frame.groupby(["symbol", "spec", "start"], sort=False)["revision"].transform("max")
    return frame[frame["revision"] == latest].reset_index(drop=True)
