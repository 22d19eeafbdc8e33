"""barsmith's one settings object.

Precedence, lowest first: defaults < TOML file (``--config``) < ``BARSMITH_*``
environment variables (nested with ``__``, e.g. ``BARSMITH_PARQUET__DIR``) < CLI flags.
Cheap checks happen when the object is built; every problem is reported at once as a
:class:`~barsmith.errors.ConfigError` whose message lists them one per line.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator
from pydantic_settings import (
    BaseSettings,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    TomlConfigSettingsSource,
)

from barsmith.bars.spec import BarSpec, parse_specs
from barsmith.errors import BarSpecError, ConfigError


class ParquetSettings(BaseModel):
    """The Parquet sink; active when ``dir`` is set."""

    model_config = ConfigDict(extra="forbid")

    dir: Path | None = None
    row_group_rows: int = Field(65_536, gt=0, description="bars buffered per row group")
    max_file_rows: int = Field(5_000_000, gt=0, description="a file rolls after this many bars")
    roll_interval_s: float | None = Field(None, gt=0, description="a file rolls after this many seconds")
    compression: Literal["zstd", "snappy", "gzip", "none"] = "zstd"


class Settings(BaseSettings):
    """Every setting barsmith reads; units are in the names."""

    model_config = SettingsConfigDict(
        env_prefix="BARSMITH_", env_nested_delimiter="__", extra="forbid", validate_default=True
    )

    bars: list[str] = Field(default_factory=lambda: ["time:1m"], description="bar specs")
    lateness_ms: int = Field(2_000, ge=0, le=3_600_000, description="allowed event-time lateness")
    parquet: ParquetSettings = Field(default_factory=ParquetSettings)

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
    def lateness_ns(self) -> int:
        return self.lateness_ms * 1_000_000

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
    (``None`` overrides are ignored). Raises :class:`ConfigError` listing every problem."""
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
