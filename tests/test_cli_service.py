"""CLI behaviour of the service commands that needs no broker."""

from __future__ import annotations

import json
import signal

import pytest

from barsmith.cli import main
from barsmith.runner import Runner
from barsmith.sinks.base import MemorySink
from barsmith.sources.base import ListSource

CONFIG = "config/barsmith.example.toml"


def test_config_check_prints_effective_settings_with_secrets_masked(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("BARSMITH_KAFKA__SECURITY__PROTOCOL", "SASL_SSL")
    monkeypatch.setenv("BARSMITH_KAFKA__SECURITY__SASL_MECHANISM", "SCRAM-SHA-512")
    monkeypatch.setenv("BARSMITH_KAFKA__SECURITY__SASL_USERNAME", "barsmith")
    monkeypatch.setenv("BARSMITH_KAFKA__SECURITY__SASL_PASSWORD", "hunter2-not-printed")
    assert main(["config", "check", CONFIG]) == 0
    out = capsys.readouterr().out
    assert "hunter2" not in out
    effective = json.loads(out)
    assert effective["kafka"]["security"]["sasl_password"] == "**********"
    assert effective["bars"] == ["time:1m", "volume:5000", "notional:1e6"]


def test_config_check_lists_every_problem(tmp_path: object, capsys: pytest.CaptureFixture[str]) -> None:
    from pathlib import Path

    bad = Path(str(tmp_path)) / "bad.toml"
    bad.write_text('bars = ["time:7q"]\nlateness_ms = -5\n[service]\nworkers = 0\n')
    assert main(["config", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "3 problems" in err and "time:7q" in err and "lateness_ms" in err and "service.workers" in err


def test_run_without_a_sink_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run", "--bootstrap", "127.0.0.1:1", "--metrics-port", "0"]) == 2
    assert "no sink" in capsys.readouterr().err


def test_second_signal_forces_exit() -> None:
    forced: list[bool] = []
    runner = Runner([], 0, ListSource([]), [MemorySink()], MemorySink())
    runner.on_force_exit = lambda: forced.append(True)
    runner.handle_exit(signal.SIGTERM)
    assert runner.should_exit and not runner.force_exit and forced == []
    runner.handle_exit(signal.SIGTERM)
    assert runner.force_exit and forced == [True]


def test_workers_get_their_command_lines_from_the_cli() -> None:
    import sys

    from barsmith.cli import _worker_commands

    argv = ["run", "--bootstrap", "k:9092", "--workers", "2", "--metrics-port=9500", "--bars", "time:1m"]
    commands = _worker_commands(argv, 2, 9500)
    head = [sys.executable, "-m", "barsmith", "run", "--bootstrap", "k:9092", "--bars", "time:1m", "--workers", "1"]
    assert commands == [[*head, "--metrics-port", "9500"], [*head, "--metrics-port", "9501"]]
    # Metrics on any free port (0) or none: every worker keeps the flags as given.
    argv = ["run", "--workers=3", "--metrics-port", "0"]
    assert (
        _worker_commands(argv, 3, 0)
        == [[sys.executable, "-m", "barsmith", "run", "--metrics-port", "0", "--workers", "1"]] * 3
    )
