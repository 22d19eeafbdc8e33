"""barsmith's one settings object.

Precedence, lowest first: defaults < TOML file (``--config``) < ``BARSMITH_*``
environment variables (nested with ``__``, e.g. ``BARSMITH_PARQUET__DIR``) < CLI flags.
Cheap checks happen when the object is built; every problem is reported at once as a
:class:`~barsmith.errors.ConfigError` whose message lists them one per line.
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import json
import os
import tomllib
from collections.abc import Mapping, Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any, Literal, get_origin

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SecretStr,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)
from pydantic_settings import (
    BaseSettings,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    SettingsError,
    TomlConfigSettingsSource,
)

from barsmith._quick_settings import DEFAULT_METRICS_PORT, LATENESS_MS_MAX
from barsmith.bars.calendar import Calendars, load_calendars
from barsmith.bars.family import SpecContext
from barsmith.bars.group import StatOptions
from barsmith.bars.spec import DEFAULT_GROUPS, BarSpec, parse_specs
from barsmith.errors import BarSpecError, ConfigError
from barsmith.ingest.eventtime import StreamLimits
from barsmith.ingest.framing import DEFAULT_MAX_RECORD_BYTES


class ParquetSettings(BaseModel):
    """The Parquet sink; active when ``dir`` is set."""

    model_config = ConfigDict(extra="forbid")

    dir: Path | None = None
    row_group_rows: int = Field(4_096, gt=0, description="bars buffered per row group")
    max_file_rows: int = Field(5_000_000, gt=0, description="a file rolls after this many bars")
    roll_interval_s: float | None = Field(None, gt=0, description="a file rolls after this many seconds")
    compression: Literal["zstd", "snappy", "gzip", "none"] = "zstd"
    output_mode: Literal["revisions", "final"] = Field(
        "revisions", description="with revision_window_ms: write every revision, or each bar once when final"
    )


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
    output_mode: Literal["revisions", "final"] = Field(
        "revisions", description="with revision_window_ms: publish every revision, or each bar once when final"
    )
    output_linger_ms: int = Field(5, ge=0, le=10_000)
    session_timeout_ms: int = Field(10_000, ge=1_000, le=300_000, description="group member declared dead after")
    state_topic: str | None = Field(None, description="checkpoints (compacted); default <group_id>.barsmith-state")
    state_partitions: int = Field(8, gt=0, description="partitions if the service creates the state topic")
    replication_factor: int | None = Field(
        None,
        ge=1,
        le=32_767,
        description="replicas of each topic barsmith creates (output, state; publish's input); "
        "unset: the broker's default.replication.factor",
    )
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
    port: int | None = Field(DEFAULT_METRICS_PORT, ge=0, le=65_535, description="unset: no endpoint; 0: any free port")


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


class EventTimeSettings(BaseModel):
    """Event-time guards: one bad clock must not poison a stream (README, "Event time")."""

    model_config = ConfigDict(extra="forbid")

    max_jump_s: float = Field(
        3_600.0, gt=0, description="a tick this far ahead of the stream's time waits for confirmation"
    )
    max_ahead_of_wall_s: float | None = Field(
        600.0, gt=0, description="the service rejects ticks this far past the wall clock (unset: no limit)"
    )
    max_behind_s: float = Field(300.0, gt=0, description="a tick this far behind its symbol's time is rejected")
    max_held_ticks: int = Field(10_000, gt=0, description="at most this many ticks wait for confirmation")
    contradict_messages: int = Field(
        1_000, gt=0, description="a waiting tick is rejected after this many ticks in the stream's time"
    )


class SessionSettings(BaseModel):
    """Trading calendars for ``session:`` bars (README, "Sessions")."""

    model_config = ConfigDict(extra="forbid")

    calendars_file: Path | None = Field(None, description="TOML calendar file: venues, sessions, symbol mapping")
    outside: Literal["drop", "bars"] = Field("drop", description="messages outside sessions: drop (counted), or bars")

    def context(self) -> SpecContext:
        """What session families need to parse: the calendars, loaded (cached)."""
        path = self.calendars_file
        if path is None:
            return SpecContext(None, self.outside)
        try:
            stamp = path.stat().st_mtime_ns
        except OSError:
            return SpecContext(load_calendars(path), self.outside)  # says what is wrong with it
        return SpecContext(_load_calendars_cached(str(path), stamp), self.outside)


class StatisticsSettings(BaseModel):
    """Settings of statistic groups (README, "Microstructure statistics")."""

    model_config = ConfigDict(extra="forbid")

    rv_sample_ms: int = Field(
        1_000, gt=0, le=86_400_000, description="realized_var samples the mid this often from each bar's start"
    )
    depth_levels: int = Field(
        5, gt=0, le=1_000, description="depth books: the depth group sums the best this many levels per side"
    )

    def options(self) -> StatOptions:
        return StatOptions(rv_sample_ns=self.rv_sample_ms * 1_000_000, depth_levels=self.depth_levels)


class LimitsSettings(BaseModel):
    """Bounds that keep memory in check under hostile input."""

    model_config = ConfigDict(extra="forbid")

    max_symbols: int = Field(200_000, gt=0, description="distinct symbols per stream (replay, or a partition)")
    max_record_bytes: int = Field(
        DEFAULT_MAX_RECORD_BYTES,
        ge=1_024,
        le=1 << 30,
        description="a record (tick map or batch) larger than this is rejected as too_large",
    )
    max_depth_levels: int = Field(
        1_000, gt=0, le=1_000_000, description="price levels per side of a depth book; more: too_many_levels"
    )


class Settings(BaseSettings):
    """Every setting barsmith reads; units are in the names."""

    model_config = SettingsConfigDict(
        env_prefix="BARSMITH_",
        env_nested_delimiter="__",
        env_parse_none_str="",  # an empty variable unsets an optional setting
        extra="forbid",
        validate_default=True,
    )

    # Before ``bars``: the specs' validation reads these two.
    sessions: SessionSettings = Field(default_factory=SessionSettings)
    bar_groups: list[str] = Field(
        default_factory=lambda: list(DEFAULT_GROUPS),
        description="statistic groups of a bar spec that names none (spec@group,...); core is always carried",
    )
    bars: list[str] = Field(default_factory=lambda: ["time:1m"], description="bar specs")
    lateness_ms: int = Field(2_000, ge=0, le=LATENESS_MS_MAX, description="allowed event-time lateness")
    revision_window_ms: int = Field(
        0, ge=0, le=7 * 86_400_000, description="a straggler this long after its time bar closed revises it (0: late)"
    )
    parquet: ParquetSettings = Field(default_factory=ParquetSettings)
    kafka: KafkaSettings = Field(default_factory=KafkaSettings)
    metrics: MetricsSettings = Field(default_factory=MetricsSettings)
    service: ServiceSettings = Field(default_factory=ServiceSettings)
    checkpoint: CheckpointSettings = Field(default_factory=CheckpointSettings)
    event_time: EventTimeSettings = Field(default_factory=EventTimeSettings)
    limits: LimitsSettings = Field(default_factory=LimitsSettings)
    statistics: StatisticsSettings = Field(default_factory=StatisticsSettings)

    @field_validator("bar_groups")
    @classmethod
    def _groups_known(cls, value: list[str]) -> list[str]:
        try:
            parse_specs(["time:1m"], value)
        except BarSpecError as exc:
            raise ValueError(str(exc).replace("bad bar spec 'time:1m': ", "")) from None
        return value

    @field_validator("bars")
    @classmethod
    def _specs_parse(cls, value: list[str], info: ValidationInfo) -> list[str]:
        sessions = info.data.get("sessions")
        try:
            context = sessions.context() if isinstance(sessions, SessionSettings) else None
            parse_specs(value, info.data.get("bar_groups", DEFAULT_GROUPS), context)
        except (BarSpecError, ConfigError) as exc:
            raise ValueError(str(exc)) from None
        return value

    def bar_specs(self) -> list[BarSpec]:
        context = dataclasses.replace(
            self.sessions.context(), revisions=self.revision_window_ms > 0, statistics=self.statistics.options()
        )
        return parse_specs(self.bars, self.bar_groups, context)

    @property
    def state_topic(self) -> str:
        return self.kafka.state_topic or f"{self.kafka.group_id}.barsmith-state"

    @property
    def lateness_ns(self) -> int:
        return self.lateness_ms * 1_000_000

    @property
    def revision_window_ns(self) -> int:
        return self.revision_window_ms * 1_000_000

    def stream_limits(self) -> StreamLimits:
        """The per-stream guards and bounds the engines apply."""
        guard = self.event_time
        ahead = guard.max_ahead_of_wall_s
        return StreamLimits(
            max_jump_ns=_ns(guard.max_jump_s),
            max_ahead_of_wall_ns=_ns(ahead) if ahead is not None else None,
            max_behind_ns=_ns(guard.max_behind_s),
            max_held=guard.max_held_ticks,
            contradict_messages=guard.contradict_messages,
            max_symbols=self.limits.max_symbols,
            max_depth_levels=self.limits.max_depth_levels,
        )

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


@functools.lru_cache(maxsize=8)
def _load_calendars_cached(path: str, mtime_ns: int) -> Calendars:
    return load_calendars(path)


def _ns(seconds: float) -> int:
    return round(seconds * 1e9)


# The TOML file of the settings being built (pydantic-settings builds sources per class).
_TOML_FILE: dict[str, Path | None] = {"path": None}


def load_settings(
    config_file: str | os.PathLike[str] | None = None, *, flags: Mapping[str, str] | None = None, **overrides: Any
) -> Settings:
    """Build settings from an optional TOML file, the environment and CLI overrides
    (``None`` overrides are ignored; nested sections are given as dicts and merged
    into the file's and environment's values). Raises :class:`ConfigError` listing
    every problem, each naming where its value came from: ``flags`` maps a setting's
    dotted name to the command-line flag that carried it (``{"metrics.port":
    "--metrics-port"}``), otherwise the environment variable or the TOML file."""
    path = Path(config_file) if config_file is not None else None
    if path is not None and not path.is_file():
        raise ConfigError(f"config file not found: {path}")
    given = {k: v for k, v in overrides.items() if v is not None}
    origins = SettingOrigins(given, flags or {}, os.environ, path)
    _TOML_FILE["path"] = path
    try:
        settings = Settings(**given)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, origins, origins.unknown_sections())) from None
    except SettingsError as exc:  # an environment variable that is not the JSON its setting needs
        raise ConfigError(origins.explain_unparsed(exc)) from None
    except ValueError as exc:  # a TOML syntax error
        raise ConfigError(f"cannot read {path}: {exc}") from None
    finally:
        _TOML_FILE["path"] = None
    problems = origins.unknown_sections()
    if problems:
        raise ConfigError(_listed(problems))
    return settings


class SettingOrigins:
    """Where the values being validated came from, for error messages. Precedence,
    highest first: flags (the caller's overrides), ``BARSMITH_*`` environment
    variables, the TOML file; a value none of them gave is a default."""

    def __init__(
        self, given: Mapping[str, Any], flags: Mapping[str, str], environ: Mapping[str, str], toml_file: Path | None
    ) -> None:
        self._given = given
        self._flags = flags
        self._environ = {name.upper(): name for name in environ if name.upper().startswith(_ENV_PREFIX)}
        self._values = environ
        self._toml_file = toml_file
        self._toml: dict[str, Any] | None = None

    def of(self, path: Sequence[str]) -> str | None:
        """Where the value at ``path`` came from (``None``: a default)."""
        if _supplies(self._given, path):
            flag = next((self._flags[p] for p in _prefixes(path) if p in self._flags), None)
            return f"flag {flag}" if flag else "the caller's arguments"
        for prefix in _prefixes(path):
            name = self._environ.get(_ENV_PREFIX + prefix.upper().replace(".", "__"))
            if name is not None:
                return f"environment variable {name}"
        if self._toml_file is not None and _supplies(self._toml_data(), path):
            return f"config file {self._toml_file}"
        return None

    def unknown_sections(self) -> list[str]:
        """Nested variables (``BARSMITH_X__Y``) of a section that does not exist: the
        settings library ignores them, so a typo would go unnoticed."""
        problems = []
        for upper, name in sorted(self._environ.items()):
            parts = upper.removeprefix(_ENV_PREFIX).lower().split("__")
            if len(parts) > 1 and parts[0] not in Settings.model_fields:
                problems.append(_unknown(parts, f"environment variable {name}"))
        return problems

    def explain_unparsed(self, exc: SettingsError) -> str:
        """An environment variable whose value is not JSON although its setting needs a
        list or a section."""
        bad = []
        for upper, name in sorted(self._environ.items()):
            parts = upper.removeprefix(_ENV_PREFIX).lower().split("__")
            if _is_structured(_annotation_at(parts)):
                try:
                    json.loads(self._values[name])
                except ValueError:
                    bad.append(
                        f"{'.'.join(parts)}: not JSON (from environment variable {name}); lists and sections "
                        """are written as JSON, e.g. '["k1:9092", "k2:9092"]'"""
                    )
        return _listed(bad) if bad else f"the BARSMITH_* environment variables: {exc}"

    def _toml_data(self) -> dict[str, Any]:
        if self._toml is None:
            assert self._toml_file is not None
            with self._toml_file.open("rb") as handle:
                self._toml = tomllib.load(handle)
        return self._toml


_ENV_PREFIX = "BARSMITH_"
_SECRET_WORDS = ("password", "secret")


def _prefixes(path: Sequence[str]) -> list[str]:
    """``a.b.c``, ``a.b``, ``a``: the setting and the sections holding it, most specific first."""
    return [".".join(path[:n]) for n in range(len(path), 0, -1)]


def _supplies(tree: Mapping[str, Any], path: Sequence[str]) -> bool:
    """Whether ``tree`` (nested dicts) gives a value at ``path``, or a non-section value
    on the way there (the value being validated)."""
    node: Any = tree
    for part in path:
        if not isinstance(node, Mapping):
            return True
        if part not in node:
            return False
        node = node[part]
    return True


def _annotation_at(path: Sequence[str]) -> Any:
    """The declared type of the setting at ``path``, or None when there is no such setting."""
    model: Any = Settings
    annotation: Any = None
    for part in path:
        if not (isinstance(model, type) and issubclass(model, BaseModel)) or part not in model.model_fields:
            return None
        annotation = model.model_fields[part].annotation
        model = annotation
    return annotation


def _is_structured(annotation: Any) -> bool:
    if annotation is None:
        return False
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return True
    return get_origin(annotation) in (list, dict)


def _unknown(path: Sequence[str], origin: str | None) -> str:
    """ "unknown setting `a.b`", with where it came from and the nearest known name."""
    # The first part that names no setting.
    depth = next((n for n in range(len(path)) if _annotation_at(path[: n + 1]) is None), len(path) - 1)
    parent = _annotation_at(path[:depth]) if depth else Settings
    known = list(parent.model_fields) if isinstance(parent, type) and issubclass(parent, BaseModel) else []
    hint = difflib.get_close_matches(path[depth], known, n=1)
    notes = [f"from {origin}"] if origin else []
    if hint:
        notes.append(f"did you mean `{'.'.join([*path[:depth], hint[0], *path[depth + 1 :]])}`?")
    return f"unknown setting `{'.'.join(path)}`" + (f" ({'; '.join(notes)})" if notes else "")


# What a failed check means, in barsmith's words (by the validation library's error type).
_PROBLEMS: dict[str, str] = {
    "greater_than": "must be more than {gt}",
    "greater_than_equal": "must be at least {ge}",
    "less_than": "must be less than {lt}",
    "less_than_equal": "must be at most {le}",
    "int_parsing": "must be a whole number",
    "int_type": "must be a whole number",
    "int_from_float": "must be a whole number",
    "float_parsing": "must be a number",
    "float_type": "must be a number",
    "bool_parsing": "must be true or false",
    "bool_type": "must be true or false",
    "string_type": "must be text",
    "list_type": "must be a list",
    "dict_type": "must be a section (a table of keys)",
    "model_type": "must be a section (a table of keys)",
    "literal_error": "must be {expected}",
    "enum": "must be {expected}",
    "missing": "is required",
    "json_invalid": "is not valid JSON",
}


def format_validation_error(
    exc: ValidationError, origins: SettingOrigins | None = None, more: Sequence[str] = ()
) -> str:
    """Every problem of ``exc`` (and ``more``) in barsmith's words, each naming the
    setting, what is wrong, the value given (never a secret's) and where it came from:
    one line for one problem; otherwise a heading and one line per problem."""
    problems = []
    for error in exc.errors():
        path = [str(p) for p in error["loc"] if isinstance(p, str)]
        origin = origins.of(path) if origins is not None and path else None
        if error["type"] == "extra_forbidden":
            problems.append(_unknown(path, origin))
            continue
        template = _PROBLEMS.get(error["type"])
        ctx = error.get("ctx") or {}
        try:
            problem = template.format(**ctx) if template else None
        except (KeyError, IndexError):
            problem = None
        if problem is None:
            problem = str(error["msg"]).removeprefix("Value error, ")
        value = error.get("input")
        if error["type"] != "value_error" and _shown(path, value):
            problem += f", got {value!r}"
        where = ".".join(path) or "settings"
        problems.append(f"{where}: {problem}" + (f" (from {origin})" if origin else ""))
    return _listed([*problems, *more])


def _shown(path: Sequence[str], value: Any) -> bool:
    """Whether a rejected value may be quoted back: a short scalar, and never a secret's."""
    if any(word in part for part in path for word in _SECRET_WORDS):
        return False
    return isinstance(value, (str, int, float, bool)) and len(repr(value)) <= 80


def _listed(problems: Sequence[str]) -> str:
    if len(problems) == 1:
        return problems[0]
    return f"{len(problems)} problems in the settings:\n" + "\n".join(f"  - {p}" for p in problems)
