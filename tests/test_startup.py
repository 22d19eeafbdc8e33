"""Start-up: what each entry point imports, and replay's settings without the validation library.

A command that imports nothing it does not run starts in a fraction of the time; the speed itself
is measured by ``barsmith bench``, never asserted here. These tests pin the imports, in a fresh
interpreter each (this test process has imported everything already).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import msgpack
import pandas as pd
import pytest

from barsmith._quick_settings import (
    LATENESS_MS_MAX,
    REPLAY_DEFAULTS,
    TOP_LEVEL_SETTINGS,
    environment_sets_settings,
    quick_replay_values,
)
from barsmith.errors import ConfigError
from barsmith.replay import ReplayPlan, plan_replay, replay_files
from barsmith.settings import Settings, load_settings

ROOT = Path(__file__).resolve().parents[1]
_KAFKA_AND_METRICS = {"aiokafka", "kafka", "prometheus_client"}
_SETTINGS_LIBRARY = {"pydantic", "pydantic_settings", "pydantic_core"}
_FRAMES = {"pandas", "pyarrow", "numpy"}


def _clean_env() -> dict[str, str]:
    """The environment without barsmith settings (those would send replay the full way)."""
    env = {k: v for k, v in os.environ.items() if not k.upper().startswith("BARSMITH_")}
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")]))
    return env


def _modules_after(code: str, env: dict[str, str] | None = None) -> set[str]:
    """The top-level packages imported by a fresh interpreter running ``code``."""
    script = f"{code}\nimport json, sys\nprint(json.dumps(sorted(sys.modules)))"
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, check=True, env=env or _clean_env()
    )
    names: list[str] = json.loads(done.stdout.strip().splitlines()[-1])
    return {name.partition(".")[0] for name in names}


def _one_record_feed(path: Path) -> Path:
    tick = {"sym": "FENWORTH~KESMOOR", "ts": 1_798_794_012_250_000_000, "seq": 1, "kind": "snapshot", "bid_px": 10.0}
    path.write_bytes(msgpack.packb(tick))
    return path


def test_import_barsmith_loads_no_kafka_client_pandas_or_settings_library() -> None:
    loaded = _modules_after("import barsmith")
    assert not loaded & (_KAFKA_AND_METRICS | _SETTINGS_LIBRARY | _FRAMES)


def test_the_public_names_still_resolve_on_first_use() -> None:
    loaded = _modules_after("import barsmith\nassert barsmith.Engine.__name__ == 'Engine'")
    assert "pandas" not in loaded and "aiokafka" not in loaded


def test_help_loads_none_of_the_heavy_libraries() -> None:
    code = "from barsmith.cli import main\ntry:\n    main(['--help'])\nexcept SystemExit:\n    pass"
    assert not _modules_after(code) & (_KAFKA_AND_METRICS | _SETTINGS_LIBRARY | _FRAMES)


def test_replay_of_a_tiny_file_to_parquet_loads_only_what_it_runs(tmp_path: Path) -> None:
    feed = _one_record_feed(tmp_path / "one.msgpack")
    out = tmp_path / "out"
    argv = ["replay", str(feed), "--bars", "time:1m", "--out", str(out), "--quiet"]
    code = f"from barsmith.cli import main\nassert main({argv!r}) == 0"
    loaded = _modules_after(code)
    assert "barsmith" in loaded and "cramjam" in loaded  # it did write (compressed) Parquet
    assert not loaded & (_KAFKA_AND_METRICS | _SETTINGS_LIBRARY | _FRAMES)  # barsmith's own writer
    assert "asyncio" not in loaded  # files and Parquet run without an event loop
    assert len(pd.read_parquet(out)) == 1


def test_replay_with_a_setting_in_the_environment_builds_the_full_settings(tmp_path: Path) -> None:
    feed = _one_record_feed(tmp_path / "one.msgpack")
    env = {**_clean_env(), "BARSMITH_PARQUET__COMPRESSION": "snappy"}
    code = f"from barsmith.replay import replay_files\nreplay_files([{str(feed)!r}], {str(tmp_path / 'out')!r})"
    assert "pydantic_settings" in _modules_after(code, env)


# -- the quick path agrees with the settings object ---------------------------------------------


def _setting(settings: Settings, dotted: str) -> Any:
    value: Any = settings
    for part in dotted.split("."):
        value = getattr(value, part)
    return value


def test_the_defaults_table_is_settings_defaults(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in list(os.environ):
        if name.upper().startswith("BARSMITH_"):
            monkeypatch.delenv(name)
    settings = Settings()
    for dotted, value in REPLAY_DEFAULTS.items():
        actual = _setting(settings, dotted)
        assert actual == value, f"barsmith/_quick_settings.py: {dotted} is {value!r}, Settings() has {actual!r}"
    assert set(Settings.model_fields) == TOP_LEVEL_SETTINGS
    assert Settings.model_fields["lateness_ms"].metadata[-1].le == LATENESS_MS_MAX


@pytest.mark.parametrize(
    ("bars", "lateness_ms"),
    [
        (None, None),
        (["time:1m", "volume:5000", "notional:1e6"], None),
        (["time:250ms@core"], 0),
        (["volume:50@core,spread", "time:1h"], LATENESS_MS_MAX),
    ],
)
def test_replay_plans_agree(monkeypatch: pytest.MonkeyPatch, bars: list[str] | None, lateness_ms: int | None) -> None:
    for name in list(os.environ):
        if name.upper().startswith("BARSMITH_"):
            monkeypatch.delenv(name)
    values = quick_replay_values(None, bars, lateness_ms)
    assert values is not None
    quick = ReplayPlan.from_defaults(values)
    full = ReplayPlan.from_settings(load_settings(bars=bars, lateness_ms=lateness_ms))
    assert quick == full
    assert [s.columns for s in quick.specs] == [s.columns for s in full.specs]


def test_unusual_values_take_the_full_path_and_its_messages(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in list(os.environ):
        if name.upper().startswith("BARSMITH_"):
            monkeypatch.delenv(name)
    assert quick_replay_values(None, None, LATENESS_MS_MAX + 1) is None
    assert quick_replay_values(None, None, -1) is None
    assert quick_replay_values("barsmith.toml", None, None) is None
    with pytest.raises(ConfigError, match=r"lateness_ms: must be at most 3600000.*flag --lateness"):
        plan_replay(lateness_ms=LATENESS_MS_MAX + 1, flags={"lateness_ms": "--lateness"})
    with pytest.raises(ConfigError, match=r"^bars: .*flag --bars"):
        plan_replay(bars=["time:soon"], flags={"bars": "--bars"})


def test_which_variables_give_settings() -> None:
    assert not environment_sets_settings({"PATH": "/bin", "BARSMITH_BROKER_LOG": "x"})
    assert environment_sets_settings({"BARSMITH_LATENESS_MS": "5"})
    assert environment_sets_settings({"barsmith_parquet__compression": "snappy"})
    assert environment_sets_settings({"BARSMITH_NOSUCH__X": "1"})  # a typo the full path reports


def test_replay_reads_the_environment_through_the_full_settings(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    feed = _one_record_feed(tmp_path / "one.msgpack")
    monkeypatch.setenv("BARSMITH_LATENESS_MS", "-5")
    with pytest.raises(ConfigError, match="BARSMITH_LATENESS_MS"):
        replay_files([feed], tmp_path / "out")
