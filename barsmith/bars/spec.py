"""Bar specs: ``<family>:<argument>[@<group>,<group>...]``.

The family keyword picks the sampling rule (``time:1m``, ``trades:50``,
``volume:5000``, ``notional:1e6``; see :mod:`barsmith.bars.family`); the optional
``@`` list names the statistic groups its bars carry (``time:1m@core`` for lean
bars, ``volume:5000@core,spread``; ``@all`` for every group). Without it, a spec
carries the default groups (the ``bar_groups`` setting; ``core`` and ``spread``
unless changed). ``core`` is always carried. The text as written is the bars'
``spec`` column.
"""

from __future__ import annotations

import enum
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Final

import barsmith.bars  # noqa: F401  (registers the built-in families and groups)
from barsmith.bars.bar import BAR_COLUMNS, DEFAULT_COLUMNS, layout_columns
from barsmith.bars.columns import FRAME_HEAD, FRAME_TAIL, REVISION, Column
from barsmith.bars.family import FAMILIES, FAMILY_COLUMNS, BarFamily, SpecContext
from barsmith.bars.group import GROUPS, StatGroup, StatOptions
from barsmith.bars.interval import TimeFamily
from barsmith.bars.threshold import ThresholdFamily
from barsmith.errors import BarSpecError

DEFAULT_GROUPS: Final = ("core", "spread")
ALWAYS: Final = "core"
ALL: Final = "all"  # ``@all``: every registered group, in registration order


class BarKind(enum.Enum):
    """The built-in bar families, by spec keyword."""

    TIME = "time"
    SESSION = "session"
    TRADES = "trades"
    VOLUME = "volume"
    NOTIONAL = "notional"


_BUILT_IN: Final = frozenset(kind.value for kind in BarKind)
# Keywords barsmith no longer takes, with the one to write instead and why.
RENAMED: Final = {
    "ticks": ("trades", "it counts trades, while barsmith calls every message a tick"),
}


@dataclass(frozen=True, slots=True)
class BarSpec:
    """One bar set. ``text`` is the spec exactly as the user wrote it (the ``spec``
    column); ``family`` is its sampling rule and ``groups`` the statistic groups its
    bars carry, in column order. ``interval_ns`` (time bars) and ``threshold`` (the
    others) repeat the family's parameter for convenience."""

    text: str
    kind: BarKind | None  # None for a family registered beyond the built-in ones
    family: BarFamily = field(compare=False, repr=False)
    groups: tuple[str, ...] = DEFAULT_GROUPS
    interval_ns: int = 0
    threshold: float = 0.0
    revisions: bool = False  # bars may be revised: they carry a ``revision`` column
    # The groups themselves, configured by the ``statistics`` settings (one per name).
    stat_groups: tuple[StatGroup, ...] = field(default=(), compare=False, repr=False)

    def __post_init__(self) -> None:
        if not self.stat_groups:
            object.__setattr__(
                self, "stat_groups", tuple(GROUPS[name].configured(StatOptions()) for name in self.groups)
            )

    @property
    def is_time(self) -> bool:
        return self.family.closes_by_time

    @property
    def columns(self) -> tuple[Column, ...]:
        """The columns of this spec's bars, in order (frame, groups, ``complete``)."""
        return layout_columns(self.stat_groups, self.family.columns, self.revisions)

    @property
    def group_labels(self) -> list[str]:
        """The groups with their settings (``rv(1000ms)``): what a checkpoint compares."""
        return [group.label for group in self.stat_groups]

    @property
    def file_stem(self) -> str:
        """A file-name-safe form of the spec (``time:1m`` → ``time_1m``)."""
        return re.sub(r"[^A-Za-z0-9.+-]+", "_", self.text.strip())

    @classmethod
    def parse(
        cls, text: str, default_groups: Sequence[str] = DEFAULT_GROUPS, context: SpecContext | None = None
    ) -> BarSpec:
        """Parse a spec; raises :class:`BarSpecError` with a one-line explanation.
        ``context``: what some families need (calendars for ``session:``)."""
        rule, at, group_text = text.partition("@")
        kind_text, sep, arg = rule.partition(":")
        keyword = kind_text.strip().lower()
        parser = FAMILIES.get(keyword)
        if keyword in RENAMED and parser is None:
            new, why = RENAMED[keyword]
            raise BarSpecError(
                f"bad bar spec {text!r}: the {keyword}: family is now {new}: ({why}); "
                f"write {new}:{arg.strip()}" + (f"@{group_text}" if at else "")
            )
        if parser is None:
            raise BarSpecError(f"bad bar spec {text!r}: expected {_forms()}")
        if not sep or not arg.strip():
            raise BarSpecError(f"bad bar spec {text!r}: missing the value after '{keyword}:'")
        context = context if context is not None else SpecContext()
        family = parser(text, arg, context)
        groups = _groups(text, group_text if at else None, default_groups)
        interval_ns = family.interval_ns if isinstance(family, TimeFamily) else 0
        threshold = family.threshold if isinstance(family, ThresholdFamily) else 0.0
        kind = BarKind(keyword) if keyword in _BUILT_IN else None
        options = context.statistics if context.statistics is not None else StatOptions()
        stat_groups = tuple(GROUPS[name].configured(options) for name in groups)
        return cls(text, kind, family, groups, interval_ns, threshold, context.revisions, stat_groups)


def _forms() -> str:
    forms = {
        "time": "time:<duration>",
        "session": "session:<duration|full>",
        "trades": "trades:<N>",
        "volume": "volume:<Q>",
        "notional": "notional:<X>",
        "tick-imbalance": "tick-imbalance:<E0[T]>[,span=..][,bound=..]",
        "volume-imbalance": "volume-imbalance:<E0[T]>[,...]",
        "notional-imbalance": "notional-imbalance:<E0[T]>[,...]",
    }
    listed = [forms.get(keyword, f"{keyword}:<...>") for keyword in FAMILIES]
    return ", ".join(listed[:-1]) + " or " + listed[-1] + " (optionally @<groups>)"


def _groups(text: str, listed: str | None, default: Sequence[str]) -> tuple[str, ...]:
    names = [name.strip() for name in listed.split(",")] if listed is not None else list(default)
    if listed is not None and not any(names):
        raise BarSpecError(f"bad bar spec {text!r}: name at least one statistic group after '@'")
    if ALL in names:
        if len(names) > 1:
            raise BarSpecError(f"bad bar spec {text!r}: '@all' stands alone (it names every statistic group)")
        names = list(GROUPS)
    unknown = [name for name in names if name not in GROUPS]
    if unknown:
        raise BarSpecError(
            f"bad bar spec {text!r}: unknown statistic group {unknown[0]!r} "
            f"(known: {', '.join(sorted(GROUPS))}, or all)"
        )
    if len(set(names)) != len(names):
        raise BarSpecError(f"bad bar spec {text!r}: a statistic group is named twice")
    ordered = [ALWAYS, *(name for name in names if name != ALWAYS)]
    return tuple(ordered)


__all__ = [
    "BAR_COLUMNS",
    "DEFAULT_COLUMNS",
    "DEFAULT_GROUPS",
    "BarKind",
    "BarSpec",
    "column_table",
    "parse_specs",
    "shown_columns",
]


def column_table() -> str:
    """Every column barsmith can write, as a Markdown table (the README's, and
    ``barsmith columns``): the frame first, then each statistic group's, ``complete``."""
    lines = ["| column | group | type | null | meaning |", "|---|---|---|---|---|"]
    rows = [("frame", c) for c in FRAME_HEAD]
    # Families with the same columns (the imbalance families) share their rows.
    owners: dict[tuple[Column, ...], list[str]] = {}
    for keyword, columns in FAMILY_COLUMNS.items():
        owners.setdefault(columns, []).append(f"{keyword}:")
    rows += [(", ".join(keywords), c) for columns, keywords in owners.items() for c in columns]
    rows += [(group.name, c) for group in GROUPS.values() for c in group.columns]
    rows += [("revisions", REVISION)]
    rows += [("frame", c) for c in FRAME_TAIL]
    for group, column in rows:
        null = "yes" if column.nullable else "no"
        lines.append(f"| `{column.name}` | {group} | {column.kind} | {null} | {column.doc} |")
    return "\n".join(lines)


def shown_columns() -> list[str]:
    """The columns ``barsmith show`` prints, in column order."""
    shown = [c.name for c in FRAME_HEAD if c.show]
    shown += [c.name for group in GROUPS.values() for c in group.columns if c.show]
    return shown + [c.name for c in FRAME_TAIL if c.show]


def parse_specs(
    texts: list[str], default_groups: Sequence[str] = DEFAULT_GROUPS, context: SpecContext | None = None
) -> list[BarSpec]:
    """Parse several specs, rejecting an empty list and repeats."""
    if not texts:
        raise BarSpecError("no bar spec given (e.g. --bars time:1m)")
    specs = [BarSpec.parse(text, default_groups, context) for text in texts]
    seen: set[str] = set()
    for spec in specs:
        if spec.text in seen:
            raise BarSpecError(f"bar spec {spec.text!r} given twice")
        seen.add(spec.text)
    return specs
