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
from barsmith.settings import KafkaSettings
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
    replay.add_argument(
        "files",
        nargs="+",
        metavar="FILE",
        help="recorded feeds (msgpack or framed recordings, optionally .gz), in order",
    )
    replay.add_argument("--bars", action="append", required=True, metavar="SPEC", help="bar spec, repeatable")
    replay.add_argument("--out", required=True, type=Path, metavar="DIR", help="output directory for Parquet")
    replay.add_argument("--lateness", type=_duration_ms, metavar="DUR", help="allowed lateness (default 2s)")
    replay.add_argument("--config", metavar="FILE", help="TOML settings file")
    replay.add_argument("--replace", action="store_true", help="replace Parquet files already in --out")
    replay.add_argument(
        "--partitions", type=_positive_int, default=1, metavar="N", help="build per bus partition, as `run` does"
    )
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

    run = commands.add_parser("run", help="run the live service on Kafka")
    run.add_argument("--config", metavar="FILE", help="TOML settings file")
    run.add_argument("--bootstrap", metavar="HOST:PORT[,...]", help="Kafka bootstrap servers")
    run.add_argument("--input-topic", action="append", metavar="TOPIC", help="input topic, repeatable")
    run.add_argument("--output-topic", metavar="TOPIC", help="bus sink: publish bars here")
    run.add_argument("--group", metavar="ID", help="consumer group id")
    run.add_argument("--client-id", metavar="ID")
    run.add_argument("--bars", action="append", metavar="SPEC", help="bar spec, repeatable")
    run.add_argument("--lateness", type=_duration_ms, metavar="DUR")
    run.add_argument("--idle-close", type=_duration_ms, metavar="DUR", help="idle rule delay (default 10s)")
    run.add_argument("--parquet-dir", type=Path, metavar="DIR", help="Parquet sink: write bars here")
    run.add_argument("--metrics-port", type=int, metavar="PORT", help="HTTP port for /metrics (0: any free)")
    run.add_argument("--workers", type=_positive_int, metavar="N", help="processes in the group on this host")
    run.add_argument("--exit-when-idle", type=_duration_ms, metavar="DUR", help="drain mode: exit after DUR idle")
    run.add_argument(
        "--delivery",
        choices=["exactly-once", "at-least-once"],
        help="output guarantee (default exactly-once; at-least-once may repeat bars after a crash)",
    )
    run.add_argument(
        "--checkpoint-interval", type=_duration_ms, metavar="DUR", help="exactly-once: checkpoint cadence (default 2s)"
    )
    run.add_argument("--log-json", action="store_true", default=None, help="log lines as JSON")
    run.set_defaults(handler=_cmd_run)

    publish = commands.add_parser("publish", help="publish a recorded feed to a topic, keyed by symbol")
    publish.add_argument("files", nargs="+", type=Path, metavar="FILE")
    publish.add_argument("--bootstrap", required=True, metavar="HOST:PORT[,...]")
    publish.add_argument("--topic", required=True)
    publish.add_argument("--partitions", type=_positive_int, default=8, help="partitions if the topic is created")
    publish.add_argument("--speed", type=float, metavar="X", help="pace at X times event time (1 = real time)")
    publish.add_argument("--batch", type=_positive_int, default=1, metavar="N", help="ticks per record (arrays)")
    publish.set_defaults(handler=_cmd_publish)

    record = commands.add_parser("record", help="capture a topic to a replayable file")
    record.add_argument("--bootstrap", required=True, metavar="HOST:PORT[,...]")
    record.add_argument("--topic", required=True)
    record.add_argument("--out", required=True, type=Path, metavar="FILE")
    record.add_argument("--idle", type=_duration_ms, default=5000, metavar="DUR", help="stop after DUR without data")
    record.add_argument(
        "--plain", action="store_true", help="a bare concatenation of the records (default: checksummed blocks)"
    )
    record.set_defaults(handler=_cmd_record)

    config = commands.add_parser("config", help="inspect settings")
    config_commands = config.add_subparsers(dest="config_command", required=True, parser_class=_Parser)
    check = config_commands.add_parser("check", help="print the effective settings (secrets masked)")
    check.add_argument("file", nargs="?", metavar="FILE", help="TOML settings file")
    check.set_defaults(handler=_cmd_config_check)

    bench = commands.add_parser("bench", help="measure replay throughput against msgpack decoding")
    bench.add_argument("--ticks", type=_positive_int, default=2_000_000)
    bench.add_argument("--symbols", type=_positive_int, default=20)
    bench.add_argument("--seed", type=int, default=11)
    bench.add_argument("--bootstrap", metavar="HOST:PORT", help="benchmark the service through this broker instead")
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
        partitions=args.partitions,
        progress=progress,
    )
    if progress is not None:
        progress.close()
    if not args.quiet:
        for line in summary.lines():
            print(line, file=sys.stderr)
        print(f"bars written to {args.out}", file=sys.stderr)
    return EXIT_INTERRUPTED if summary.interrupted else EXIT_OK


def _service_overrides(args: argparse.Namespace) -> dict[str, object]:
    """CLI flags as nested settings overrides (None = not given)."""
    kafka: dict[str, object] = {}
    if args.bootstrap:
        kafka["bootstrap_servers"] = [s.strip() for s in args.bootstrap.split(",") if s.strip()]
    if args.input_topic:
        kafka["input_topics"] = args.input_topic
    for key, value in (("output_topic", args.output_topic), ("group_id", args.group), ("client_id", args.client_id)):
        if value is not None:
            kafka[key] = value
    service: dict[str, object] = {}
    if args.idle_close is not None:
        service["idle_close_s"] = args.idle_close / 1000.0
    if args.workers is not None:
        service["workers"] = args.workers
    if args.exit_when_idle is not None:
        service["exit_when_idle_s"] = args.exit_when_idle / 1000.0
    if args.log_json:
        service["log_json"] = True
    if args.delivery is not None:
        service["delivery"] = args.delivery
    checkpoint: dict[str, object] = {}
    if args.checkpoint_interval is not None:
        checkpoint["interval_s"] = args.checkpoint_interval / 1000.0
    return {
        "checkpoint": checkpoint or None,
        "bars": args.bars,
        "lateness_ms": args.lateness,
        "kafka": kafka or None,
        "service": service or None,
        "parquet": {"dir": args.parquet_dir} if args.parquet_dir is not None else None,
        "metrics": {"port": args.metrics_port} if args.metrics_port is not None else None,
    }


def _cmd_run(args: argparse.Namespace) -> int:
    from barsmith.service.app import configure_logging, run_service, run_workers
    from barsmith.settings import load_settings

    settings = load_settings(args.config, **_service_overrides(args))
    configure_logging(settings.service.log_json)
    if settings.service.workers > 1:
        argv = list(sys.argv[1:] if args.argv is None else args.argv)
        return run_workers(settings, _strip_workers(argv))
    summary = run_service(settings)
    for line in summary.lines():
        print(line, file=sys.stderr)
    return EXIT_OK


def _strip_workers(argv: list[str]) -> list[str]:
    out: list[str] = []
    skip = False
    for arg in argv:
        if skip:
            skip = False
            continue
        if arg == "--workers":
            skip = True
            continue
        if arg.startswith("--workers="):
            continue
        out.append(arg)
    return out


def _kafka_for(bootstrap: str) -> KafkaSettings:
    from barsmith.settings import load_settings

    settings = load_settings(kafka={"bootstrap_servers": [s.strip() for s in bootstrap.split(",") if s.strip()]})
    return settings.kafka


def _cmd_publish(args: argparse.Namespace) -> int:
    import asyncio

    from barsmith.sources.files import check_input_paths
    from barsmith.tools.bus import publish_feed

    if args.speed is not None and args.speed <= 0:
        raise ConfigError("--speed must be > 0")
    files = check_input_paths(args.files)
    summary = asyncio.run(
        publish_feed(files, _kafka_for(args.bootstrap), args.topic, args.partitions, args.speed, args.batch)
    )
    print(
        f"published {summary.ticks:,} ticks in {summary.records:,} records to {args.topic} "
        f"in {summary.seconds:.1f} s ({summary.skipped} unreadable span(s) skipped)",
        file=sys.stderr,
    )
    return EXIT_OK


def _cmd_record(args: argparse.Namespace) -> int:
    import asyncio

    from barsmith.tools.bus import record_topic

    count = asyncio.run(
        record_topic(_kafka_for(args.bootstrap), args.topic, args.out, args.idle / 1000.0, plain=args.plain)
    )
    print(f"recorded {count:,} records from {args.topic} to {args.out}", file=sys.stderr)
    return EXIT_OK


def _cmd_config_check(args: argparse.Namespace) -> int:
    import json

    from barsmith.settings import load_settings

    settings = load_settings(args.file)
    settings.bar_specs()
    print(json.dumps(settings.masked(), indent=2, default=str))
    print("settings are valid", file=sys.stderr)
    return EXIT_OK


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
    if args.bootstrap:
        from barsmith.tools.bench_bus import run_bus_bench

        lines = run_bus_bench(args.bootstrap, args.ticks, args.seed)
    else:
        from barsmith.tools.bench import run_bench

        lines = run_bench(args.ticks, args.symbols, args.seed)
    for line in lines:
        print(line)
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``barsmith`` console script; returns the exit status."""
    args = build_parser().parse_args(argv)
    args.argv = list(argv) if argv is not None else None
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
