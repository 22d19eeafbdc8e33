"""Bar specs: ``time:<duration>``, ``ticks:<N>``, ``volume:<Q>``, ``notional:<X>``."""

from __future__ import annotations

import enum
import math
import re
from dataclasses import dataclass
from typing import Final

from barsmith.errors import BarSpecError, ConfigError
from barsmith.units import parse_duration_ns

_NUMBER: Final = re.compile(r"^\s*[0-9]+(\.[0-9]*)?([eE][+-]?[0-9]+)?\s*$")


class BarKind(enum.Enum):
    """The sampling rule of a bar family."""

    TIME = "time"
    TICKS = "ticks"
    VOLUME = "volume"
    NOTIONAL = "notional"


@dataclass(frozen=True, slots=True)
class BarSpec:
    """One bar family. ``text`` is the spec exactly as the user wrote it (the ``spec``
    column); ``interval_ns`` is set for time bars, ``threshold`` for the others."""

    text: str
    kind: BarKind
    interval_ns: int = 0
    threshold: float = 0.0

    @property
    def is_time(self) -> bool:
        return self.kind is BarKind.TIME

    @property
    def file_stem(self) -> str:
        """A file-name-safe form of the spec (``time:1m`` → ``time_1m``)."""
        return re.sub(r"[^A-Za-z0-9.+-]+", "_", self.text.strip())

    @classmethod
    def parse(cls, text: str) -> BarSpec:
        """Parse a spec; raises :class:`BarSpecError` with a one-line explanation."""
        kind_text, sep, arg = text.partition(":")
        try:
            kind = BarKind(kind_text.strip().lower())
        except ValueError:
            raise BarSpecError(
                f"bad bar spec {text!r}: expected time:<duration>, ticks:<N>, volume:<Q> or notional:<X>"
            ) from None
        if not sep or not arg.strip():
            raise BarSpecError(f"bad bar spec {text!r}: missing the value after '{kind.value}:'")
        if kind is BarKind.TIME:
            try:
                return cls(text, kind, interval_ns=parse_duration_ns(arg))
            except ConfigError as exc:
                raise BarSpecError(f"bad bar spec {text!r}: {exc}") from None
        if kind is BarKind.TICKS:
            if not arg.strip().isdigit() or int(arg) <= 0:
                raise BarSpecError(f"bad bar spec {text!r}: ticks needs a whole number of trades > 0")
            return cls(text, kind, threshold=float(int(arg)))
        if _NUMBER.match(arg) is None or not math.isfinite(float(arg)) or float(arg) <= 0.0:
            raise BarSpecError(f"bad bar spec {text!r}: {kind.value} needs a number > 0")
        return cls(text, kind, threshold=float(arg))


def parse_specs(texts: list[str]) -> list[BarSpec]:
    """Parse several specs, rejecting an empty list and repeats."""
    if not texts:
        raise BarSpecError("no bar spec given (e.g. --bars time:1m)")
    specs = [BarSpec.parse(text) for text in texts]
    seen: set[str] = set()
    for spec in specs:
        if spec.text in seen:
            raise BarSpecError(f"bar spec {spec.text!r} given twice")
        seen.add(spec.text)
    return specs
