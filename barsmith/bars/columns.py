"""The column table: every bar column defined once, by the part of barsmith that owns it.

A :class:`Column` names a column, its type, whether it may be null, and one line of
documentation. The frame columns (which bar: ``symbol``, ``spec``, ``start``, ``end``,
and whether it is ``complete``) belong to every bar; every other column belongs to a
statistic group (:mod:`barsmith.bars.group`). The Parquet schema, the bus record,
``barsmith show`` and the README's column table all derive from these definitions.

Types are names, not pyarrow objects, so that the per-tick modules never import
pyarrow: ``string``, ``timestamp`` (ns since the epoch, UTC), ``float64``, ``int64``
and ``bool``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

KINDS: Final = frozenset({"string", "timestamp", "float64", "int64", "bool"})


@dataclass(frozen=True, slots=True)
class Column:
    """One output column of a bar."""

    name: str
    kind: str
    nullable: bool
    doc: str
    show: bool = False  # printed by ``barsmith show``

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"column {self.name}: unknown type {self.kind!r}")


FRAME_HEAD: Final = (
    Column("symbol", "string", False, "the symbol", show=True),
    Column("spec", "string", False, "the bar spec, as the user wrote it", show=True),
    Column("start", "timestamp", False, "time bars: the interval's start; event bars: the first trade's ts", show=True),
    Column(
        "end", "timestamp", False, "time bars: the interval's end; event bars: the closing (last) trade's ts", show=True
    ),
)
FRAME_TAIL: Final = (
    Column(
        "complete",
        "bool",
        False,
        "false only for a bar emitted because input ended (or the run was stopped) before its closing condition",
        show=True,
    ),
)
REVISION: Final = Column(
    "revision",
    "int64",
    False,
    "with revision_window_ms: 0 for a bar's first publication, one more for each correction by a straggler",
)
