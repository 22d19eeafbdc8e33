"""Settings: TOML < environment < flags; problems reported together."""

from __future__ import annotations

from pathlib import Path

import pytest

from barsmith.errors import ConfigError
from barsmith.settings import load_settings

EXAMPLE = Path(__file__).resolve().parents[1] / "config" / "barsmith.example.toml"


def test_example_config_is_valid() -> None:
    settings = load_settings(EXAMPLE)
    assert settings.bars == ["time:1m", "volume:5000", "notional:1e6"]
    assert settings.parquet.compression == "zstd"


def test_precedence(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    toml = tmp_path / "b.toml"
    toml.write_text('bars = ["time:5m"]\nlateness_ms = 100\n[parquet]\ncompression = "gzip"\n')
    assert load_settings(toml).lateness_ms == 100
    monkeypatch.setenv("BARSMITH_LATENESS_MS", "200")
    monkeypatch.setenv("BARSMITH_PARQUET__COMPRESSION", "snappy")
    settings = load_settings(toml)
    assert settings.lateness_ms == 200 and settings.parquet.compression == "snappy"
    assert settings.bars == ["time:5m"]
    assert load_settings(toml, lateness_ms=300).lateness_ms == 300


def test_every_problem_is_listed(tmp_path: Path) -> None:
    toml = tmp_path / "bad.toml"
    toml.write_text('bars = ["time:1q"]\nlateness_ms = -1\nsurprise = 1\n')
    with pytest.raises(ConfigError) as info:
        load_settings(toml)
    text = str(info.value)
    assert "3 problems" in text and "time:1q" in text and "lateness_ms" in text and "surprise" in text


def test_missing_config_file() -> None:
    with pytest.raises(ConfigError, match="config file not found"):
        load_settings("/nonexistent/barsmith.toml")


def test_max_record_bytes_default_and_bounds() -> None:
    assert load_settings().max_record_bytes == 4 * 1024 * 1024
    assert load_settings(max_record_bytes=2048).max_record_bytes == 2048
    with pytest.raises(ConfigError, match="max_record_bytes"):
        load_settings(max_record_bytes=10)
