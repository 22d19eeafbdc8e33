"""barsmith's exception tree.

Every error barsmith raises on purpose derives from :class:`BarsmithError`, so a
caller can catch the whole family in one place. Third-party errors are converted
at the boundary where they enter, with the original chained as ``__cause__``::

    BarsmithError
    ├── ConfigError            bad settings, bar specs, paths or flags (exit status 2)
    │   └── BarSpecError       a bar spec that does not parse
    ├── InputError             an input that cannot be read at all (missing file, I/O error)
    ├── SinkError              a sink could not write or publish
    ├── CheckpointError        a checkpoint that cannot be restored (says why and what to do)
    └── StateError             an impossible state transition (a bug: carries symbol/offset)

A malformed *record* is not an exception: it is counted and written to the rejects
file, and the run goes on (see :mod:`barsmith.ingest.ticks`).
"""

from __future__ import annotations


class BarsmithError(Exception):
    """Base class of every error barsmith raises on purpose."""


class ConfigError(BarsmithError):
    """Settings, flags, bar specs or paths are unusable; the CLI exits with status 2."""


class BarSpecError(ConfigError):
    """A bar spec such as ``time:1m`` or ``volume:500`` does not parse."""


class InputError(BarsmithError):
    """An input source cannot be opened or read."""


class SinkError(BarsmithError):
    """A sink failed to write or publish bars."""


class CheckpointError(BarsmithError):
    """A checkpoint that cannot be used: unknown format version, other settings, damage."""


class StateError(BarsmithError):
    """An impossible state transition; the message names the symbol and position."""


def describe_error(exc: BaseException) -> str:
    """A third-party exception as words for a message: ``"FormatError: bad header"``,
    or just the type's name when the exception says nothing more (never ``"X: "``)."""
    text = str(exc).strip()
    name = type(exc).__name__
    if not text or text == name:
        return name
    return text if text.startswith(f"{name}:") else f"{name}: {text}"
