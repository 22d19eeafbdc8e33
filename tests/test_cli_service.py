"""CLI behaviour of the service commands that needs no broker."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from factories import free_port_pair

from barsmith.cli import main
from barsmith.runner import Runner
from barsmith.sinks.base import MemorySink
from barsmith.sources.base import ListSource

CONFIG = "config/barsmith.example.toml"
ROOT = Path(__file__).resolve().parents[1]


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


@pytest.mark.parametrize(
    "command",
    [
        ["run", "--output-topic", "bars", "--metrics-port", "0"],
        ["run", "--output-topic", "bars", "--metrics-port", "0", "--delivery", "at-least-once"],
        ["publish", "demo_feeds/kestrelmoor-evening.msgpack.gz", "--topic", "ticks"],
        ["record", "--topic", "ticks", "--out", "unused.msgpack"],
    ],
    ids=["run", "run-at-least-once", "publish", "record"],
)
def test_kafka_unreachable_is_one_barsmith_line_naming_the_servers(command: list[str], tmp_path: Path) -> None:
    """No broker listens: exit 1 with one line in barsmith's words that names the bootstrap
    servers; no Python reprs, and none of the Kafka client's own error lines before it."""
    port = free_port_pair()  # free: nothing listens there
    servers = f"127.0.0.1:{port}"
    done = subprocess.run(
        [sys.executable, "-m", "barsmith", *command, "--bootstrap", servers],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
        env=dict(os.environ, BARSMITH_PARQUET__DIR=str(tmp_path)),
    )
    assert done.returncode == 1, done.stderr
    lines = done.stderr.strip().splitlines()
    name = command[0]
    assert lines[-1] == (
        f"barsmith {name}: failed: cannot reach Kafka at {servers} (the admin client could not start): "
        "connection refused"
    )
    for line in lines[:-1]:  # only barsmith's own log lines before it (the metrics endpoint)
        assert " barsmith." in line and "aiokafka" not in line, line
    assert "Traceback" not in done.stderr and "<" not in done.stderr
