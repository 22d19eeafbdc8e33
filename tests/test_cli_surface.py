"""The command line as a newcomer meets it: help on every command and flag, and every
mistake answered by one line and the documented exit status (README, "Exit status":
2 for a usage error such as a bad path or flag, 1 for an input that cannot be read),
never a traceback."""

from __future__ import annotations

import argparse
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import msgpack
import pytest
from factories import T0, S, snap, trade

from barsmith.cli import build_parser, main


def walk(parser: argparse.ArgumentParser, path: str = "barsmith") -> Iterator[tuple[str, argparse.Action]]:
    """Every action of every (sub)command, with the command it belongs to."""
    for action in parser._actions:
        yield path, action
        if isinstance(action, argparse._SubParsersAction):
            for name, child in action.choices.items():
                yield from walk(child, f"{path} {name}")


def test_every_command_and_flag_has_help_text() -> None:
    missing = []
    commands = 0
    for path, action in walk(build_parser()):
        if isinstance(action, argparse._SubParsersAction):
            helps = {choice.dest: choice.help for choice in action._choices_actions}
            missing += [f"{path} {name}" for name in action.choices if not helps.get(name)]
            commands += len(action.choices)
        if not action.help or action.help == argparse.SUPPRESS:
            missing.append(f"{path} {'/'.join(action.option_strings) or action.dest}")
    assert commands >= 9  # replay show synth run publish record config bench + config check
    assert not missing, missing


def test_the_walk_notices_a_flag_without_help() -> None:
    parser = build_parser()
    parser.add_argument("--undocumented")
    assert any(a.dest == "undocumented" and not a.help for _, a in walk(parser))


def run(*args: str) -> int:
    return main(list(args))


def one_line(capsys: pytest.CaptureFixture[str]) -> str:
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "Traceback" not in err, err
    return err


# -- show --------------------------------------------------------------------------------


@pytest.fixture
def bars_dir(tmp_path: Path) -> Path:
    """A replay output of two symbols and two specs; one symbol only ever quotes."""
    feed = tmp_path / "feed.msgpack"
    records = [snap("MARROWAY~KESMOOR", T0 + i * S, i + 1, bid_px=10.0, ask_px=10.5) for i in range(130)]
    records += [trade("FENWORTH~KESMOOR", T0 + 90 * S + i * S, i + 1, 20.0 + i % 3, 2.0) for i in range(60)]
    feed.write_bytes(b"".join(msgpack.packb(r) for r in sorted(records, key=lambda r: r["ts"])))
    out = tmp_path / "bars"
    assert run("replay", "--quiet", str(feed), "--bars", "time:1m", "--bars", "volume:1000", "--out", str(out)) == 0
    return out


def test_show_prints_bars_with_trades_first_and_says_what_it_hid(
    bars_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert run("show", str(bars_dir), "--spec", "time:1m") == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    # MARROWAY only quotes: its three minute bars have no trade and are hidden.
    assert lines[0] == f"5 bars in {bars_dir} (3 without trades hidden; --all shows them); the first 2 by start:"
    assert "MARROWAY" not in out and len(lines) == 2 + 2
    assert run("show", str(bars_dir), "--spec", "time:1m", "--all") == 0
    assert capsys.readouterr().out.count("MARROWAY") == 3


@pytest.mark.parametrize("case", ["empty", "rejects only", "not parquet"])
def test_show_on_a_directory_without_bar_files_is_one_line_exit_2(
    case: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    directory = tmp_path / "d"
    directory.mkdir()
    if case == "rejects only":
        text = tmp_path / "text.msgpack"
        text.write_text("not a feed at all\n")
        assert run("replay", "--quiet", "--allow-empty", str(text), "--bars", "time:1m", "--out", str(directory)) == 0
        assert [p.name for p in directory.iterdir()] == ["_rejects.parquet"]
    if case == "not parquet":
        (directory / "notes.txt").write_text("bars go here\n")
        (directory / "bars.csv").write_text("symbol,open\n")
    assert run("show", str(directory)) == 2
    why = {"empty": "it is empty", "rejects only": "only rejects: _rejects.parquet"}
    expected = f"barsmith show: error: no bar files in {directory} ({why.get(case, '2 other file(s)')}"
    assert one_line(capsys).startswith(expected)


def test_show_on_a_damaged_bar_file_is_one_line_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "time_1m-000001.parquet").write_bytes(b"PAR1 but cut short")
    assert run("show", str(tmp_path)) == 1
    assert one_line(capsys).startswith(f"barsmith show: failed: cannot read bar file {tmp_path}/time_1m-000001.parquet")


def test_show_of_a_spec_or_symbol_not_there_lists_what_is(bars_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert run("show", str(bars_dir), "--spec", "time:5m") == 2
    assert one_line(capsys) == (
        f"barsmith show: error: no bars of spec 'time:5m' in {bars_dir}; its specs: time:1m, volume:1000"
    )
    assert run("show", str(bars_dir), "--symbol", "QUILLFERN~KESMOOR") == 2
    assert one_line(capsys) == (
        f"barsmith show: error: no bars of symbol 'QUILLFERN~KESMOOR' in {bars_dir}; "
        "2 symbol(s): FENWORTH~KESMOOR, MARROWAY~KESMOOR"
    )


def test_show_on_an_empty_directory_in_a_real_process_prints_no_traceback(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "barsmith", "show", str(tmp_path)], capture_output=True, text=True, check=False
    )
    assert done.returncode == 2
    assert done.stderr == f"barsmith show: error: no bar files in {tmp_path} (it is empty)\n"


# -- replay ------------------------------------------------------------------------------


def test_replay_that_accepts_nothing_fails_unless_allowed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = tmp_path / "notes.txt"
    text.write_text("These are meeting notes, not a feed.\n" * 20)
    args = ["replay", "--quiet", str(text), "--bars", "time:1m", "--out", str(tmp_path / "o")]
    assert run(*args) == 1
    err = one_line(capsys)
    assert err.startswith("barsmith replay: failed: no tick was accepted from notes.txt (")
    assert "record(s) rejected: " in err and "_rejects.parquet" in err and "--allow-empty" in err
    assert run(*args, "--replace", "--allow-empty") == 0
    empty = tmp_path / "empty.msgpack"
    empty.write_bytes(b"")
    assert run("replay", "--quiet", str(empty), "--bars", "time:1m", "--out", str(tmp_path / "e")) == 1
    assert "no tick was accepted from empty.msgpack (it holds no records)" in one_line(capsys)


@pytest.mark.parametrize("lateness", ["500us", "1500us", "2000001ns"])
def test_a_duration_finer_than_a_millisecond_is_refused(
    lateness: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    feed = tmp_path / "f.msgpack"
    feed.write_bytes(msgpack.packb(trade("FENWORTH~KESMOOR", T0, 1, 10.0, 1.0)))
    with pytest.raises(SystemExit) as info:
        run("replay", str(feed), "--bars", "time:1m", "--out", str(tmp_path / "o"), "--lateness", lateness)
    assert info.value.code == 2
    err = one_line(capsys)
    assert f"'{lateness}' is finer than barsmith's resolution (1ms)" in err


def test_a_duration_of_whole_milliseconds_is_taken(tmp_path: Path) -> None:
    feed = tmp_path / "f.msgpack"
    feed.write_bytes(msgpack.packb(trade("FENWORTH~KESMOOR", T0, 1, 10.0, 1.0)))
    for lateness in ("1500ms", "2000000ns", "3000us", "0s"):
        assert run("replay", "--quiet", "--replace", str(feed), "--bars", "time:1m", "--out", str(tmp_path / "o"),
                   "--lateness", lateness) == 0  # fmt: skip


# -- synth and bench -----------------------------------------------------------------------


def test_synth_and_bench_say_how_many_symbols_they_can_invent(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from barsmith.tools.synth import MAX_SYMBOLS

    assert run("synth", "--out", str(tmp_path / "f.msgpack"), "--symbols", str(MAX_SYMBOLS + 1)) == 2
    assert (
        one_line(capsys)
        == f"barsmith synth: error: --symbols: at most {MAX_SYMBOLS} (the generator's invented listings)"
    )
    assert run("bench", "--symbols", str(MAX_SYMBOLS + 1), "--ticks", "10") == 2
    assert one_line(capsys).startswith(f"barsmith bench: error: --symbols: at most {MAX_SYMBOLS}")
    for command in ("synth", "bench"):
        assert f"1 to {MAX_SYMBOLS}" in _help(command, "--symbols")
    with pytest.raises(SystemExit) as info:
        run("synth", "--out", str(tmp_path / "f.msgpack"), "--malformed", "-1")
    assert info.value.code == 2


def _help(command: str, flag: str) -> str:
    for path, action in walk(build_parser()):
        if path == f"barsmith {command}" and flag in action.option_strings:
            return str(action.help)
    raise AssertionError(f"no {flag} on {command}")
