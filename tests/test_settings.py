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


def test_an_empty_environment_variable_unsets_an_optional_setting(monkeypatch: pytest.MonkeyPatch) -> None:
    # README, "Settings": BARSMITH_METRICS__PORT="" means no metrics endpoint.
    monkeypatch.setenv("BARSMITH_METRICS__PORT", "")
    monkeypatch.setenv("BARSMITH_EVENT_TIME__MAX_AHEAD_OF_WALL_S", "")
    settings = load_settings()
    assert settings.metrics.port is None and settings.event_time.max_ahead_of_wall_s is None
    assert settings.stream_limits().max_ahead_of_wall_ns is None
