"""The finished bar that every sink writes: its columns, by name, in order.

A :class:`Bar` is a row (its values, in column order) with the names of its columns,
which depend on the statistic groups its spec carries. Columns read as attributes
(``bar.close``, ``bar.spread_mean``); :meth:`Bar.as_dict` is the bus record.
Timestamps are int ns since the epoch, UTC.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

_INDEXES: dict[tuple[str, ...], dict[str, int]] = {}


def _index_of(names: tuple[str, ...]) -> dict[str, int]:
    index = _INDEXES.get(names)
    if index is None:
        index = _INDEXES[names] = {name: i for i, name in enumerate(names)}
    return index


class Bar:
    """One finished bar. Not compiled: sinks and tests read it by column name."""

    __slots__ = ("_index", "names", "values")

    def __init__(self, names: tuple[str, ...], values: Sequence[Any]) -> None:
        if len(names) != len(values):
            raise ValueError(f"a bar of {len(names)} columns got {len(values)} values")
        self.names = names
        self.values = tuple(values)
        self._index = _index_of(names)

    def __getattr__(self, name: str) -> Any:
        # Only called for names that are not slots: the bar's columns.
        try:
            return self.values[self._index[name]]
        except (KeyError, AttributeError):
            raise AttributeError(f"a bar of this spec has no column {name!r}") from None

    def get(self, name: str, default: Any = None) -> Any:
        """The column ``name``, or ``default`` when this bar's spec does not carry it."""
        position = self._index.get(name)
        return self.values[position] if position is not None else default

    def as_dict(self) -> dict[str, Any]:
        """The bar as a plain map in column order (the bus record)."""
        return dict(zip(self.names, self.values, strict=True))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Bar):
            return NotImplemented
        return self.names == other.names and self.values == other.values

    def __hash__(self) -> int:
        return hash((self.names, self.values))

    def __repr__(self) -> str:
        return f"Bar({self.as_dict()!r})"
