"""The package's public surface is exported once, from barsmith/__init__.py."""

from __future__ import annotations

import importlib.machinery
import os

import pytest

import barsmith
import barsmith.engine


def test_public_names_are_pinned() -> None:
    expected = [
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
    assert sorted(barsmith.__all__) == sorted(expected)
    for name in barsmith.__all__:
        assert hasattr(barsmith, name), name


def test_exception_tree() -> None:
    assert issubclass(barsmith.BarSpecError, barsmith.ConfigError)
    for cls in (
        barsmith.ConfigError,
        barsmith.InputError,
        barsmith.SinkError,
        barsmith.StateError,
        barsmith.CheckpointError,
    ):
        assert issubclass(cls, barsmith.BarsmithError)


@pytest.mark.skipif(os.environ.get("CI") != "true", reason="CI installs the compiled build; a checkout may not")
def test_hot_path_is_compiled_in_ci() -> None:
    # pip install . compiles the per-tick modules with mypyc (deploy/build/barsmith_build.py)...
    suffixes = tuple(importlib.machinery.EXTENSION_SUFFIXES)
    assert barsmith.engine.__file__ is not None and barsmith.engine.__file__.endswith(suffixes)
    # ... and builds the record scanner written in C.
    from barsmith.ingest.fastwire import new_scanner

    assert new_scanner() is not None
