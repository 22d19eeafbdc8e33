"""PEP 517 build backend for barsmith: setuptools, plus mypyc for the hot path.

The per-tick modules (validation, book, bar accumulators, engine, framing) are plain
typed Python; this backend compiles them to C extensions with mypyc, and builds
the record scanner written in C, so that a normal ``pip install .`` gets the fast
engine. Set ``BARSMITH_PURE_PYTHON=1`` to build without compiling (for editable
development: an in-place extension would shadow edits to its ``.py`` file).
"""

from __future__ import annotations

import os
from typing import Any

from setuptools import build_meta as _setuptools_backend

HOT_MODULES = [
    "barsmith/ingest/ticks.py",
    "barsmith/ingest/framing.py",
    "barsmith/ingest/eventtime.py",
    "barsmith/book/depth.py",
    "barsmith/book/book.py",
    "barsmith/bars/columns.py",
    "barsmith/bars/group.py",
    "barsmith/bars/core.py",
    "barsmith/bars/spread.py",
    "barsmith/bars/signed.py",
    "barsmith/bars/micro.py",
    "barsmith/bars/family.py",
    "barsmith/bars/interval.py",
    "barsmith/bars/threshold.py",
    "barsmith/bars/imbalance.py",
    "barsmith/bars/bar.py",
    "barsmith/engine.py",
]


# The record scanner, in C (see barsmith/ingest/fastwire.py for why).
SCANNER_MODULE = "barsmith.ingest._wirescan"
SCANNER_SOURCE = "barsmith/ingest/_wirescan.c"


def _compile_hot_modules() -> bool:
    return os.environ.get("BARSMITH_PURE_PYTHON", "") not in {"1", "true", "yes"}


class _Backend(_setuptools_backend._BuildMetaBackend):
    def run_setup(self, setup_script: str = "setup.py") -> None:
        from setuptools import setup

        ext_modules: list[Any] = []
        if _compile_hot_modules():
            from mypyc.build import mypycify
            from setuptools import Extension

            # --config-file= : the project's mypy config loads plugins that the
            # isolated build environment does not have; the hot modules need none.
            ext_modules = mypycify(
                ["--config-file=", "--ignore-missing-imports", "--follow-imports=silent", *HOT_MODULES],
                opt_level="3",
            )
            ext_modules.append(Extension(SCANNER_MODULE, [SCANNER_SOURCE], extra_compile_args=["-O3"]))
        setup(ext_modules=ext_modules)


_backend = _Backend()
get_requires_for_build_wheel = _backend.get_requires_for_build_wheel
get_requires_for_build_sdist = _backend.get_requires_for_build_sdist
prepare_metadata_for_build_wheel = _backend.prepare_metadata_for_build_wheel
build_wheel = _backend.build_wheel
build_sdist = _backend.build_sdist
get_requires_for_build_editable = _backend.get_requires_for_build_editable
prepare_metadata_for_build_editable = _backend.prepare_metadata_for_build_editable
build_editable = _backend.build_editable
