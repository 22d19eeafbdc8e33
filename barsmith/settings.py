"""barsmith's one settings object.

Precedence, lowest first: defaults < TOML file (``--config``) < ``BARSMITH_*``
environment variables (nested with ``__``, e.g. ``BARSMITH_PARQUET__DIR``) < CLI flags.
Cheap checks happen when the object is built; every problem is reported at once as a
:class:`~barsmith.errors.ConfigError` whose message lists them one per line.
"""

from __future__ import annotations

import os
from enum import StrEnum
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, SecretStr, ValidationError, field_validator, model_validator
from pydantic_settings import (
    BaseSettings,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    TomlConfigSettingsSource,
)

from barsmith.bars.spec import BarSpec, parse_specs
from barsmith.errors import BarSpecError, ConfigError
from barsmith.ingest.framing import DEFAULT_MAX_RECORD_BYTES


class ParquetSettings(BaseModel):
    """The Parquet sink; active when ``dir`` is set."""

    model_config = ConfigDict(extra="forbid")

    dir: Path | None = None
    row_group_rows: int = Field(4_096, gt=0, description="bars buffered per row group")
    max_file_rows: int = Field(5_000_000, gt=0, description="a file rolls after this many bars")
    roll_interval_s: float | None = Field(None, gt=0, description="a file rolls after this many seconds")
    compression: Literal["zstd", "snappy", "gzip", "none"] = "zstd"


class SecuritySettings(BaseModel):
    """How to reach the Kafka brokers. Secrets are never printed."""

    model_config = ConfigDict(extra="forbid")

    protocol: Literal["PLAINTEXT", "SSL", "SASL_PLAINTEXT", "SASL_SSL"] = "PLAINTEXT"
    sasl_mechanism: Literal["PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512"] | None = None
    sasl_username: str | None = None
    sasl_password: SecretStr | None = None
    ssl_cafile: Path | None = None
    ssl_certfile: Path | None = None
    ssl_keyfile: Path | None = None
    ssl_key_password: SecretStr | None = None

    @model_validator(mode="after")
    def _sasl_needs_credentials(self) -> SecuritySettings:
        if self.protocol.startswith("SASL"):
            if self.sasl_mechanism is None:
                raise ValueError(f"protocol {self.protocol} needs sasl_mechanism")
            if not self.sasl_username or self.sasl_password is None:
                raise ValueError(f"protocol {self.protocol} needs sasl_username and sasl_password")
        return self


class KafkaSettings(BaseModel):
    """The bus: where ticks come from and bars go."""

    model_config = ConfigDict(extra="forbid")

    bootstrap_servers: list[str] = Field(default_factory=lambda: ["127.0.0.1:19092"])
    input_topics: list[str] = Field(default_factory=lambda: ["ticks"])
    output_topic: str | None = Field(None, description="bus sink: active when set")
    output_partitions: int = Field(8, gt=0, description="partitions if the service creates the output topic")
    group_id: str = "barsmith"
    client_id: str = "barsmith"
    fetch_max_records: int = Field(4_096, gt=0, description="records per poll")
    poll_timeout_ms: int = Field(200, gt=0, le=10_000)
    commit_interval_s: float = Field(5.0, gt=0)
    output_compression: Literal["zstd", "lz4", "gzip", "none"] = "zstd"
    output_linger_ms: int = Field(5, ge=0, le=10_000)
    session_timeout_ms: int = Field(10_000, ge=1_000, le=300_000, description="group member declared dead after")
    state_topic: str | None = Field(None, description="checkpoints (compacted); default <group_id>.barsmith-state")
    state_partitions: int = Field(8, gt=0, description="partitions if the service creates the state topic")
    transaction_timeout_ms: int = Field(60_000, ge=1_000, le=900_000)
    security: SecuritySettings = Field(default_factory=SecuritySettings)


class CheckpointSettings(BaseModel):
    """Exactly-once delivery: how often each partition checkpoints and commits."""

    model_config = ConfigDict(extra="forbid")

    interval_s: float = Field(2.0, gt=0, le=3_600, description="a partition checkpoints at least this often")
    every_messages: int = Field(200_000, gt=0, description="...and after this many messages, whichever first")


class MetricsSettings(BaseModel):
    """The HTTP endpoint with /metrics, /healthz and /readyz."""

    model_config = ConfigDict(extra="forbid")

    host: str = "127.0.0.1"
    port: int | None = Field(9464, ge=0, le=65_535, description="unset: no endpoint; 0: any free port")


class Delivery(StrEnum):
    """What the live service promises about its output."""

    EXACTLY_ONCE = "exactly-once"  # transactions + checkpoints: no bar missing or doubled
    AT_LEAST_ONCE = "at-least-once"  # offsets committed after flush: a crash may repeat bars


class ServiceSettings(BaseModel):
    """The long-running daemon's behaviour."""

    model_config = ConfigDict(extra="forbid")

    idle_close_s: float = Field(10.0, gt=0, description="idle rule: see README")
    shutdown_timeout_s: float = Field(20.0, gt=0)
    housekeeping_interval_s: float = Field(0.5, gt=0)
    exit_when_idle_s: float | None = Field(None, gt=0, description="drain mode: exit after this long with no input")
    delivery: Delivery = Field(Delivery.EXACTLY_ONCE, description="exactly-once (default) or at-least-once")
    workers: int = Field(1, ge=1, le=64)
    log_json: bool = False


class Settings(BaseSettings):
    """Every setting barsmith reads; units are in the names."""

    model_config = SettingsConfigDict(
        env_prefix="BARSMITH_", env_nested_delimiter="__", extra="forbid", validate_default=True
    )

    bars: list[str] = Field(default_factory=lambda: ["time:1m"], description="bar specs")
    lateness_ms: int = Field(2_000, ge=0, le=3_600_000, description="allowed event-time lateness")
    max_record_bytes: int = Field(
        DEFAULT_MAX_RECORD_BYTES,
        ge=1_024,
        le=1 << 30,
        description="a record (tick map or batch) larger than this is rejected as too_large",
    )
    parquet: ParquetSettings = Field(default_factory=ParquetSettings)
    kafka: KafkaSettings = Field(default_factory=KafkaSettings)
    metrics: MetricsSettings = Field(default_factory=MetricsSettings)
    service: ServiceSettings = Field(default_factory=ServiceSettings)
    checkpoint: CheckpointSettings = Field(default_factory=CheckpointSettings)

    @field_validator("bars")
    @classmethod
    def _specs_parse(cls, value: list[str]) -> list[str]:
        try:
            parse_specs(value)
        except BarSpecError as exc:
            raise ValueError(str(exc)) from None
        return value

    def bar_specs(self) -> list[BarSpec]:
        return parse_specs(self.bars)

    @property
    def state_topic(self) -> str:
        return self.kafka.state_topic or f"{self.kafka.group_id}.barsmith-state"

    @property
    def lateness_ns(self) -> int:
        return self.lateness_ms * 1_000_000

    def masked(self) -> dict[str, Any]:
        """The effective settings as plain data, secrets shown as ``**********``."""
        data: dict[str, Any] = self.model_dump(mode="json")
        return data

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        toml_file = _TOML_FILE.get("path")
        sources: list[PydanticBaseSettingsSource] = [init_settings, env_settings]
        if toml_file is not None:
            sources.append(TomlConfigSettingsSource(settings_cls, toml_file=toml_file))
        return tuple(sources)


# The TOML file of the settings being built (pydantic-settings builds sources per class).
_TOML_FILE: dict[str, Path | None] = {"path": None}


def load_settings(config_file: str | os.PathLike[str] | None = None, **overrides: Any) -> Settings:
    """Build settings from an optional TOML file, the environment and CLI overrides
    (``None`` overrides are ignored; nested sections are given as dicts and merged
    into the file's and environment's values). Raises :class:`ConfigError` listing
    every problem."""
    path = Path(config_file) if config_file is not None else None
    if path is not None and not path.is_file():
        raise ConfigError(f"config file not found: {path}")
    _TOML_FILE["path"] = path
    try:
        return Settings(**{k: v for k, v in overrides.items() if v is not None})
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc)) from None
    except ValueError as exc:  # a TOML syntax error
        raise ConfigError(f"cannot read {path}: {exc}") from None
    finally:
        _TOML_FILE["path"] = None


def format_validation_error(exc: ValidationError) -> str:
    """One line for one problem; otherwise a heading and one line per problem."""
    problems = []
    for error in exc.errors():
        where = ".".join(str(p) for p in error["loc"]) or "settings"
        message = str(error["msg"]).removeprefix("Value error, ")
        problems.append(f"{where}: {message}")
    if len(problems) == 1:
        return problems[0]
    return f"{len(problems)} problems in the settings:\n" + "\n".join(f"  - {p}" for p in problems)
