"""The README holds: its examples run, its commands are what the code offers, and what it
says about the demo feed is what replay reports."""

from __future__ import annotations

import argparse
import math
import re
import shlex
from pathlib import Path
from typing import Any

import pytest
from factories import README, readme_blocks
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from barsmith.bars.bar import BAR_COLUMNS
from barsmith.cli import build_parser, main
from barsmith.engine import EngineStats
from barsmith.ingest.ticks import decode_tick
from barsmith.replay import replay_files
from barsmith.runner import RunSummary
from barsmith.service.metrics import PartitionView, ServiceMetrics

ROOT = README.parent
TEXT = README.read_text()
QUICK_DIR = "/tmp/barsmith-demo"


def section(title: str) -> str:
    """The README's text from the heading ``title`` to the next heading of its level or above."""
    match = re.search(rf"^(#+) {re.escape(title)}\n", TEXT, flags=re.M)
    assert match, title
    level = len(match.group(1))
    rest = TEXT[match.end() :]
    end = re.search(rf"^#{{1,{level}}} ", rest, flags=re.M)
    return rest[: end.start()] if end else rest


def quick_start() -> list[str]:
    """The two commands of "Two commands, on a fresh machine"."""
    return [block.strip() for block in readme_blocks("sh", section("Two commands, on a fresh machine"))]


def quick_start_step(program: str) -> list[str]:
    """One step of the first command line, e.g. ``barsmith replay ...``, as arguments."""
    for step in quick_start()[0].split("&&"):
        words = shlex.split(step)
        if words[:2] == program.split():
            return words[1:]
    raise AssertionError(f"no {program} in the quick start")


def test_the_quick_start_is_one_command_line_each_in_a_virtual_environment() -> None:
    install, tests = quick_start()
    assert "\n" not in install and "\n" not in tests
    assert install.startswith("python3 -m venv .venv && . .venv/bin/activate && pip install . && barsmith replay ")
    # CI runs exactly the README's test command.
    ci = (ROOT / ".ci" / "run").read_text().strip().splitlines()
    assert ci[-1] == tests == 'pip install ".[test]" && pytest'


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, RunSummary]:
    """The quick start's replay, into a temporary directory instead of /tmp/barsmith-demo."""
    args = build_parser().parse_args(quick_start_step("barsmith replay"))
    assert str(args.out) == QUICK_DIR
    out = tmp_path_factory.mktemp("demo")
    summary = replay_files([ROOT / f for f in args.files], out, bars=args.bars, replace=True)
    return out, summary


def test_the_quick_start_shows_bars_with_trades(
    demo: tuple[Path, RunSummary], capsys: pytest.CaptureFixture[str]
) -> None:
    out, _ = demo
    show = quick_start_step("barsmith show")
    assert show[1] == QUICK_DIR
    assert main([show[0], str(out), *show[2:]]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert "without trades hidden" in lines[0]
    header, rows = lines[1].split(), lines[2:]
    assert len(rows) == 8
    trades = header.index("trades")
    assert all(int(row.split()[trades + 2]) > 0 for row in rows)  # start and end take two words each


def test_the_pandas_example_runs_on_the_quick_start_output(
    demo: tuple[Path, RunSummary], capsys: pytest.CaptureFixture[str]
) -> None:
    out, _ = demo
    (block,) = [b for b in readme_blocks("python") if "read_parquet" in b]
    exec(compile(block.replace(QUICK_DIR, str(out)), "README.md", "exec"), {})
    printed = capsys.readouterr().out
    assert "datetime64[ns, UTC]" in printed and "not_a_map" in printed and "CORVESTRA~KESMOOR" in printed


def example(name: str) -> Any:
    """The value the README's example block binds to ``name``."""
    (block,) = [b for b in readme_blocks("python") if b.startswith(f"{name} = {{")]
    scope: dict[str, Any] = {}
    exec(compile(block, "README.md", "exec"), scope)
    return scope[name]


def test_the_tick_example_is_a_valid_tick() -> None:
    tick = decode_tick(example("tick"))
    assert tick.sym == "CORVESTRA~KESMOOR" and tick.trade_qty == 25.0


def test_the_bar_example_has_the_columns_and_adds_up(demo: tuple[Path, RunSummary]) -> None:
    bar = example("bar")
    assert list(bar) == list(BAR_COLUMNS)
    assert isinstance(bar["start"], int) and bar["end"] - bar["start"] == 60 * 10**9
    assert math.isclose(bar["vwap"], bar["notional"] / bar["volume"], rel_tol=1e-8)
    assert math.isclose(bar["spread_close"], bar["ask_close"] - bar["bid_close"], rel_tol=1e-9)
    assert bar["low"] <= min(bar["open"], bar["close"]) <= max(bar["open"], bar["close"]) <= bar["high"]


def test_the_demo_readme_counts_what_replay_reports(demo: tuple[Path, RunSummary]) -> None:
    _, summary = demo
    text = (ROOT / "demo_feeds" / "README.md").read_text()
    malformed = re.search(r"and (\d+) deliberately malformed records", text)
    reported = re.search(r"reports them as \*\*(\d+) rejected\*\*", text)
    assert malformed and reported
    assert f"--malformed {malformed.group(1)}" in text  # the command that made the feed
    assert int(reported.group(1)) == sum(summary.stats.rejected.values())
    breakdown = ", ".join(f"{k} {v:,}" for k, v in sorted(summary.stats.rejected.items()))
    assert f"`{breakdown}`" in " ".join(text.split())


def flags(parser: argparse.ArgumentParser) -> dict[str, list[str]]:
    """Every command's option flags."""
    out: dict[str, list[str]] = {}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, child in action.choices.items():
                out[name] = [o for a in child._actions for o in a.option_strings if o.startswith("--")]
                out[name] = [f for f in out[name] if f != "--help"]
    return out


def test_every_flag_of_every_command_is_in_the_readme() -> None:
    commands = section("Commands")
    run_flags = next(p for p in section("The live service: `barsmith run`").split("\n\n") if p.startswith("Flags:"))
    for command, options in flags(build_parser()).items():
        if command == "run":
            text = run_flags
        elif command == "config":
            continue  # its only action, check, takes a file
        else:
            rows = commands.splitlines()
            (text,) = [line for line in rows if line.startswith((f"| `barsmith {command} ", f"| `barsmith {command}`"))]
        missing = [o for o in options if f"`{o}" not in text and f"[{o}" not in text and f" {o}" not in text]
        assert not missing, (command, missing)
    assert "`deploy/kafka/broker status`" in TEXT


def test_every_metric_is_in_the_readme_and_the_readme_names_no_other() -> None:
    registry = ServiceMetrics(PartitionView(EngineStats, dict, dict)).registry
    families = list(text_string_to_metric_families(generate_latest(registry).decode()))
    names = {f.name for f in families}
    # The client library's <counter>_created gauges are its own, not barsmith's metrics.
    families = [f for f in families if not (f.name.endswith("_created") and f.name.removesuffix("_created") in names)]
    documented = {f.name + ("_total" if f.type == "counter" else "") for f in families}
    named = set(re.findall(r"`(barsmith_[a-z_]+)", TEXT))
    assert documented == named, (documented - named, named - documented)


def test_config_check_states_the_precedence() -> None:
    (row,) = [line for line in section("Commands").splitlines() if line.startswith("| `barsmith config check")]
    assert "defaults < TOML file < `BARSMITH_*` environment" in row and "flags come last" in row
