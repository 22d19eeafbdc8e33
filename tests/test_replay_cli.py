"""``barsmith replay`` end to end: files in, Parquet out, read back with pandas/pyarrow."""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import msgpack
import pandas as pd
import pyarrow.parquet as pq
import pytest
from factories import T0, S, trade

from barsmith.bars.bar import BAR_COLUMNS
from barsmith.cli import main
from barsmith.tools.synth import SynthConfig, feed_bytes, write_feed

FeedFactory = Callable[..., Path]


@pytest.fixture(scope="module")
def synth_feed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("feed") / "synth.msgpack.gz"
    write_feed(path, SynthConfig(messages=30_000, symbols=6, duration_s=900, malformed=6))
    return path


def replay(*args: str) -> int:
    return main(["replay", "--quiet", *args])


def test_replay_writes_one_row_per_bar_with_the_columns(synth_feed: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    assert replay(str(synth_feed), "--bars", "time:1m", "--bars", "volume:5000", "--out", str(out)) == 0
    frame = pd.read_parquet(out)
    assert list(frame.columns) == list(BAR_COLUMNS)
    assert set(frame["spec"]) == {"time:1m", "volume:5000"}
    # Timestamps are UTC, ns (Parquet INT64 timestamp, isAdjustedToUTC -- Parquet format spec).
    assert str(frame["start"].dtype) == "datetime64[ns, UTC]"
    schema = pq.read_schema(next(out.glob("time_1m-*.parquet")))
    assert str(schema.field("end").type) == "timestamp[ns, tz=UTC]"
    time_bars = frame[frame["spec"] == "time:1m"]
    assert not time_bars.duplicated(["symbol", "start"]).any()
    assert ((time_bars["end"] - time_bars["start"]) == pd.Timedelta(minutes=1)).all()
    # Rejects sit beside the bars, each with a reason and an offset.
    rejects = pd.read_parquet(out / "_rejects.parquet")
    assert len(rejects) >= 6
    assert rejects["position"].ge(0).all()
    assert set(rejects["reason"]) <= {
        "not_msgpack", "not_a_map", "wrong_type", "unknown_kind", "missing_field", "half_trade", "bad_value", "late"
    }  # fmt: skip


def test_split_feed_gives_the_same_bars_as_one_file(tmp_path: Path) -> None:
    records = list(feed_bytes(SynthConfig(messages=20_000, symbols=5, duration_s=600)))
    whole = tmp_path / "whole.msgpack"
    whole.write_bytes(b"".join(records))
    part1, part2 = tmp_path / "p1.msgpack.gz", tmp_path / "p2.msgpack"
    import gzip

    part1.write_bytes(gzip.compress(b"".join(records[:7_777])))
    part2.write_bytes(b"".join(records[7_777:]))
    specs = ["--bars", "time:1m", "--bars", "trades:50", "--bars", "notional:1e5"]
    assert replay(str(whole), *specs, "--out", str(tmp_path / "a")) == 0
    assert replay(str(part1), str(part2), *specs, "--out", str(tmp_path / "b")) == 0
    assert replay(str(whole), *specs, "--out", str(tmp_path / "c")) == 0
    a, b, c = (pd.read_parquet(tmp_path / d) for d in "abc")
    pd.testing.assert_frame_equal(a, b)
    pd.testing.assert_frame_equal(a, c)


def test_truncated_file_is_reported_and_valid_records_kept(feed_file: FeedFactory, tmp_path: Path) -> None:
    records = [trade("FENWORTH~KESMOOR", T0 + i * S, i + 1, 10.0, 1.0) for i in range(5)]
    data = b"".join(msgpack.packb(r) for r in records)
    path = tmp_path / "cut.msgpack"
    path.write_bytes(data[:-3])
    assert replay(str(path), "--bars", "trades:100", "--out", str(tmp_path / "o")) == 0
    bars = pd.read_parquet(tmp_path / "o")
    assert bars["trades"].sum() == 4
    rejects = pd.read_parquet(tmp_path / "o" / "_rejects.parquet")
    assert list(rejects["reason"]) == ["truncated"]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--bars", "time:1x"], "bad bar spec 'time:1x'"),
        (["--bars", "range:5"], "bad bar spec 'range:5'"),
        (["--bars", "trades:0"], "bad bar spec 'trades:0'"),
        (["--bars", "volume:-3"], "bad bar spec 'volume:-3'"),
    ],
)
def test_bad_spec_is_one_line_and_exit_2(
    args: list[str], message: str, feed_file: FeedFactory, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = feed_file([trade("FENWORTH~KESMOOR", T0, 1, 10.0, 1.0)])
    assert replay(str(path), *args, "--out", str(tmp_path / "o")) == 2
    err = capsys.readouterr().err.strip()
    assert message in err and "\n" not in err


def test_missing_file_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert replay(str(tmp_path / "nope.msgpack"), "--bars", "time:1m", "--out", str(tmp_path / "o")) == 2
    assert "input file not found" in capsys.readouterr().err


def test_existing_output_needs_replace(feed_file: FeedFactory, tmp_path: Path) -> None:
    path = feed_file([trade("FENWORTH~KESMOOR", T0, 1, 10.0, 1.0)])
    assert replay(str(path), "--bars", "time:1m", "--out", str(tmp_path / "o")) == 0
    assert replay(str(path), "--bars", "time:1m", "--out", str(tmp_path / "o")) == 2
    assert replay(str(path), "--bars", "time:1m", "--out", str(tmp_path / "o"), "--replace") == 0
    assert len(pd.read_parquet(tmp_path / "o")) == 1


def test_console_script_prints_a_summary(synth_feed: Path, tmp_path: Path) -> None:
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "barsmith",
            "replay",
            str(synth_feed),
            "--bars",
            "time:5m",
            "--out",
            str(tmp_path / "o"),
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    for word in ("messages read", "accepted", "duplicates", "sequence gaps", "rejected", "bars time:5m", "ticks/s"):
        assert word in done.stderr
    assert "\r" not in done.stderr  # no progress bar when stderr is not a terminal


def test_argparse_usage_error_is_exit_2() -> None:
    done = subprocess.run([sys.executable, "-m", "barsmith", "replay"], capture_output=True, text=True, check=False)
    assert done.returncode == 2 and "error" in done.stderr


def test_reject_details_say_what_went_wrong_without_empty_parentheses(synth_feed: Path, tmp_path: Path) -> None:
    """Every kind of malformed record the generator makes, plus bytes msgpack refuses
    with an exception that carries no message: each detail is words, never "X: " or "()"."""
    garbage = tmp_path / "garbage.msgpack"
    good = msgpack.packb(trade("FENWORTH~KESMOOR", T0, 1, 10.0, 1.0))
    garbage.write_bytes(good + b"\xc1\xc1\xc1" + good)  # 0xc1: never used, msgpack's FormatError says nothing
    for feed, name in ((synth_feed, "synth"), (garbage, "garbage")):
        assert replay(str(feed), "--bars", "time:1m", "--out", str(tmp_path / name)) == 0
        details = pd.read_parquet(tmp_path / name / "_rejects.parquet")["detail"]
        assert len(details) > 0
        for detail in details:
            assert "()" not in detail and ": )" not in detail and not detail.rstrip().endswith(":"), detail
    assert "(FormatError)" in set(pd.read_parquet(tmp_path / "garbage" / "_rejects.parquet")["detail"]).pop()


def test_describe_error_never_leaves_an_empty_message() -> None:
    from barsmith.errors import describe_error

    assert describe_error(ValueError()) == "ValueError"
    assert describe_error(ValueError("  ")) == "ValueError"
    assert describe_error(ValueError("bad header")) == "ValueError: bad header"
    assert describe_error(KeyError("sym")) == "KeyError: 'sym'"
