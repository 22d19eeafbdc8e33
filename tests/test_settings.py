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


# -- problems in barsmith's words, each naming where its value came from ----------------

PYDANTIC_WORDS = ("Extra inputs are not permitted", "Input should", "Value error", "validation error", "pydantic")


def problem(**kwargs: object) -> str:
    with pytest.raises(ConfigError) as info:
        load_settings(**kwargs)  # type: ignore[arg-type]
    text = str(info.value)
    for words in PYDANTIC_WORDS:
        assert words not in text
    return text


def test_an_unknown_key_in_the_toml_file_is_an_unknown_setting(tmp_path: Path) -> None:
    toml = tmp_path / "b.toml"
    toml.write_text('[kafka]\ngroup_idx = "desk-7"\n')
    assert problem(config_file=toml) == (
        f"unknown setting `kafka.group_idx` (from config file {toml}; did you mean `kafka.group_id`?)"
    )


def test_an_unknown_environment_variable_of_a_section_is_an_unknown_setting(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("BARSMITH_KAFKA__GROUPID", "desk-7")
    assert problem() == (
        "unknown setting `kafka.groupid` (from environment variable BARSMITH_KAFKA__GROUPID; "
        "did you mean `kafka.group_id`?)"
    )


def test_a_variable_of_an_unknown_section_is_not_ignored(monkeypatch: pytest.MonkeyPatch) -> None:
    # The settings library ignores it; a typo would silently leave the default.
    monkeypatch.setenv("BARSMITH_KAKFA__GROUP_ID", "desk-7")
    assert "unknown setting `kakfa.group_id` (from environment variable BARSMITH_KAKFA__GROUP_ID; did you mean" in (
        problem()
    )
    # Variables without "__" belong to barsmith's tools (the broker script, workers): not settings.
    monkeypatch.delenv("BARSMITH_KAKFA__GROUP_ID")
    monkeypatch.setenv("BARSMITH_KAFKA_PORT", "29092")
    assert load_settings().kafka.group_id == "barsmith"


def test_a_bad_value_names_the_variable_the_file_or_the_flag(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("BARSMITH_KAFKA__SESSION_TIMEOUT_MS", "5")
    assert problem() == (
        "kafka.session_timeout_ms: must be at least 1000, got '5' (from environment variable "
        "BARSMITH_KAFKA__SESSION_TIMEOUT_MS)"
    )
    monkeypatch.delenv("BARSMITH_KAFKA__SESSION_TIMEOUT_MS")
    toml = tmp_path / "b.toml"
    toml.write_text('lateness_ms = "soon"\n[service]\ndelivery = "twice"\n')
    text = problem(config_file=toml)
    assert f"lateness_ms: must be a whole number, got 'soon' (from config file {toml})" in text
    assert "service.delivery: must be 'exactly-once' or 'at-least-once', got 'twice'" in text
    text = problem(config_file=toml, flags={"service.workers": "--workers"}, service={"workers": 100})
    assert "service.workers: must be at most 64, got 100 (from flag --workers)" in text
    # The environment overrides the file, so it is the environment's value that is named.
    monkeypatch.setenv("BARSMITH_LATENESS_MS", "later")
    assert "lateness_ms: must be a whole number, got 'later' (from environment variable BARSMITH_LATENESS_MS)" in (
        problem(config_file=toml)
    )


def test_a_list_variable_that_is_not_json_is_named(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("BARSMITH_KAFKA__BOOTSTRAP_SERVERS", "k1:9092,k2:9092")
    text = problem()
    variable = "BARSMITH_KAFKA__BOOTSTRAP_SERVERS"
    assert text.startswith(f"kafka.bootstrap_servers: not JSON (from environment variable {variable})")
    assert "\n" not in text


def test_a_secret_is_never_quoted_back(tmp_path: Path) -> None:
    toml = tmp_path / "b.toml"
    toml.write_text("[kafka.security]\nsasl_password = 123456789\n")
    text = problem(config_file=toml)
    assert text.startswith("kafka.security.sasl_password: must be text (from config file")
    assert "123456789" not in text


def test_max_record_bytes_default_and_bounds() -> None:
    assert load_settings().limits.max_record_bytes == 4 * 1024 * 1024
    assert load_settings(limits={"max_record_bytes": 2048}).limits.max_record_bytes == 2048
    with pytest.raises(ConfigError, match="max_record_bytes"):
        load_settings(limits={"max_record_bytes": 10})
