"""Shared fixtures (the factories themselves live in factories.py)."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import pytest
from factories import write_records


@pytest.fixture
def feed_file(tmp_path: Path) -> Callable[..., Path]:
    """Factory: write records to a feed file in tmp_path."""
    counter = iter(range(1_000_000))

    def make(records: Iterable[Any], compress: bool = False, name: str | None = None) -> Path:
        file_name = name or f"feed-{next(counter)}.msgpack" + (".gz" if compress else "")
        return write_records(tmp_path / file_name, records, compress)

    return make
