"""The ``barsmith`` command line. Thin: it parses, builds settings and calls the library.

Exit status: 0 success; 1 runtime failure; 2 usage or configuration error (bad
flag, bar spec, path or setting); 130 a replay interrupted by SIGINT/SIGTERM (the
bars so far were written, open ones marked incomplete).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import NoReturn

from barsmith import __version__
from barsmith.errors import BarsmithError, ConfigError
from barsmith.units import parse_duration_ns

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_INTERRUPTED = 130


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line (plus a hint), exit status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _duration_ms(text: str) -> int:
    try:
        return parse_duration_ns(text, allow_zero=True) // 1_000_000
    except ConfigError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _positive_int(text: str) -> int:
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value <= 0:
        raise argparse.ArgumentTypeError(f"must be > 0: {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="barsmith", description="Build bars from tick feeds.")
    parser.add_argument("--version", action="version", version=f"barsmith {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    replay = commands.add_parser("replay", help="build bars from recorded feed files into Parquet")
    replay.add_argument("files", nargs="+", metavar="FILE", help="recorded feeds (msgpack, optionally .gz), in order")
    replay.add_argument("--bars", action="append", required=True, metavar="SPEC", help="bar spec, repeatable")
    replay.add_argument("--out", required=True, type=Path, metavar="DIR", help="output directory for Parquet")
    replay.add_argument("--lateness", type=_duration_ms, metavar="DUR", help="allowed lateness (default 2s)")
    replay.add_argument("--config", metavar="FILE", help="TOML settings file")
    replay.add_argument("--replace", action="store_true", help="replace Parquet files already in --out")
    replay.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    replay.set_defaults(handler=_cmd_replay)

    synth = commands.add_parser("synth", help="write a seeded synthetic feed (invented venue and symbols)")
    synth.add_argument("--out", required=True, type=Path, metavar="FILE", help="output file (.gz to compress)")
    synth.add_argument("--seed", type=int, default=7)
    synth.add_argument("--symbols", type=_positive_int, default=12)
    synth.add_argument("--messages", type=_positive_int, default=250_000)
    synth.add_argument("--duration", type=_duration_ms, default=75 * 60_000, metavar="DUR")
    synth.add_argument("--malformed", type=int, default=0, metavar="N", help="mix in N malformed records")
    synth.set_defaults(handler=_cmd_synth)

    show = commands.add_parser("show", help="print bars from a Parquet output directory")
    show.add_argument("dir", type=Path, metavar="DIR")
    show.add_argument("--spec", help="only this bar spec")
    show.add_argument("--symbol", help="only this symbol")
    show.add_argument("--rows", type=_positive_int, default=10, help="how many bars (default 10)")
    show.set_defaults(handler=_cmd_show)

    bench = commands.add_parser("bench", help="measure replay throughput against msgpack decoding")
    bench.add_argument("--ticks", type=_positive_int, default=2_000_000)
    bench.add_argument("--symbols", type=_positive_int, default=20)
    bench.add_argument("--seed", type=int, default=11)
    bench.set_defaults(handler=_cmd_bench)
    return parser


def _cmd_replay(args: argparse.Namespace) -> int:
    from barsmith.progress import ProgressBar
    from barsmith.replay import replay_files

    progress = None if args.quiet else ProgressBar()
    summary = replay_files(
        args.files,
        args.out,
        config_file=args.config,
        bars=args.bars,
        lateness_ms=args.lateness,
        replace=args.replace,
        progress=progress,
    )
    if progress is not None:
        progress.close()
    if not args.quiet:
        for line in summary.lines():
            print(line, file=sys.stderr)
        print(f"bars written to {args.out}", file=sys.stderr)
    return EXIT_INTERRUPTED if summary.interrupted else EXIT_OK


def _cmd_synth(args: argparse.Namespace) -> int:
    from barsmith.tools.synth import SynthConfig, write_feed

    if args.symbols > 24:
        raise ConfigError("--symbols: at most 24")
    cfg = SynthConfig(
        seed=args.seed,
        symbols=args.symbols,
        messages=args.messages,
        duration_s=args.duration / 1000.0,
        malformed=args.malformed,
    )
    size = write_feed(args.out, cfg)
    print(f"wrote {args.messages:,} messages ({size:,} bytes uncompressed) to {args.out}", file=sys.stderr)
    return EXIT_OK


def _cmd_show(args: argparse.Namespace) -> int:
    import pandas as pd

    if not args.dir.is_dir():
        raise ConfigError(f"not a directory: {args.dir}")
    frame = pd.read_parquet(args.dir).sort_values(["start", "symbol", "spec"], kind="stable")
    if args.spec is not None:
        frame = frame[frame["spec"] == args.spec]
    if args.symbol is not None:
        frame = frame[frame["symbol"] == args.symbol]
    columns = ["symbol", "spec", "start", "end", "open", "high", "low", "close", "volume", "vwap", "trades"]
    columns += ["spread_mean", "complete"]
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        print(f"{len(frame):,} bars in {args.dir}; the first {min(args.rows, len(frame))}:")
        print(frame[columns].head(args.rows).to_string(index=False))
    return EXIT_OK


def _cmd_bench(args: argparse.Namespace) -> int:
    from barsmith.tools.bench import run_bench

    for line in run_bench(args.ticks, args.symbols, args.seed):
        print(line)
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``barsmith`` console script; returns the exit status."""
    args = build_parser().parse_args(argv)
    handler: Callable[[argparse.Namespace], int] = args.handler
    try:
        return handler(args)
    except ConfigError as exc:
        print(f"barsmith {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except BarsmithError as exc:
        print(f"barsmith {args.command}: failed: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        return EXIT_INTERRUPTED
