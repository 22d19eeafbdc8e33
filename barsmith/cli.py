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
from typing import TYPE_CHECKING, NoReturn

from barsmith import __version__
from barsmith._quick_settings import DEFAULT_METRICS_PORT
from barsmith.errors import BarsmithError, ConfigError
from barsmith.units import parse_duration_ns

if TYPE_CHECKING:
    from barsmith.engine import EngineStats
    from barsmith.settings import KafkaSettings

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_INTERRUPTED = 130


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line (plus a hint), exit status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _duration_ms(text: str) -> int:
    """A DUR flag in whole milliseconds, the resolution of every duration setting; a
    finer one is refused rather than silently cut."""
    try:
        value_ns = parse_duration_ns(text, allow_zero=True)
    except ConfigError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    if value_ns % 1_000_000:
        raise argparse.ArgumentTypeError(f"{text!r} is finer than barsmith's resolution (1ms): give whole milliseconds")
    return value_ns // 1_000_000


def _positive_int(text: str) -> int:
    value = _whole_number(text)
    if value <= 0:
        raise argparse.ArgumentTypeError(f"must be > 0: {text!r}")
    return value


def _count(text: str) -> int:
    value = _whole_number(text)
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0: {text!r}")
    return value


def _whole_number(text: str) -> int:
    try:
        return int(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None


def _port(text: str) -> int:
    value = _whole_number(text)
    if not 0 <= value <= 65_535:
        raise argparse.ArgumentTypeError(f"not a port (0 to 65535): {text!r}")
    return value


# Flags that carry settings, by setting name: error messages say which flag gave a value.
_SETTING_FLAGS: dict[str, str] = {
    "bars": "--bars",
    "lateness_ms": "--lateness",
    "kafka.bootstrap_servers": "--bootstrap",
    "kafka.input_topics": "--input-topic",
    "kafka.output_topic": "--output-topic",
    "kafka.group_id": "--group",
    "kafka.client_id": "--client-id",
    "service.idle_close_s": "--idle-close",
    "service.workers": "--workers",
    "service.exit_when_idle_s": "--exit-when-idle",
    "service.log_json": "--log-json",
    "service.delivery": "--delivery",
    "checkpoint.interval_s": "--checkpoint-interval",
    "parquet.dir": "--parquet-dir",
    "metrics.port": "--metrics-port",
}
_BOOTSTRAP_HELP = "Kafka bootstrap servers, comma-separated (setting kafka.bootstrap_servers)"
_CONFIG_HELP = "TOML settings file (see config/barsmith.example.toml)"


def build_parser() -> argparse.ArgumentParser:
    """The command line: every command and flag has help text (a test walks the tree)."""
    parser = _Parser(prog="barsmith", description="Build bars from tick feeds: recorded files or a Kafka bus.")
    parser.add_argument("--version", action="version", version=f"barsmith {__version__}", help="print the version")
    commands = parser.add_subparsers(
        dest="command", required=True, parser_class=_Parser, metavar="COMMAND", help="what to do (COMMAND --help)"
    )
    _add_replay(commands)
    _add_show(commands)
    _add_columns(commands)
    _add_synth(commands)
    _add_run(commands)
    _add_publish(commands)
    _add_record(commands)
    _add_config(commands)
    _add_bench(commands)
    return parser


def _add_replay(commands: argparse._SubParsersAction[_Parser]) -> None:
    replay = commands.add_parser("replay", help="build bars from recorded feed files into Parquet")
    replay.add_argument(
        "files",
        nargs="+",
        metavar="FILE",
        help="recorded feeds (msgpack or framed recordings, optionally .gz), in order",
    )
    replay.add_argument(
        "--bars", action="append", required=True, metavar="SPEC", help="bar spec (time:1m, volume:5000 ...), repeatable"
    )
    replay.add_argument("--out", required=True, type=Path, metavar="DIR", help="output directory for Parquet")
    replay.add_argument(
        "--lateness", type=_duration_ms, metavar="DUR", help="allowed lateness, whole ms or coarser (default 2s)"
    )
    replay.add_argument("--config", metavar="FILE", help=_CONFIG_HELP)
    replay.add_argument("--replace", action="store_true", help="replace Parquet files already in --out")
    replay.add_argument(
        "--partitions",
        type=_positive_int,
        default=1,
        metavar="N",
        help="split by symbol into N streams as `publish` places ticks on N partitions, "
        "and build bars per stream as `run` does (default 1: one stream)",
    )
    replay.add_argument(
        "--allow-empty",
        action="store_true",
        help="exit 0 even when no tick was accepted (default: that is a failure, exit 1)",
    )
    replay.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    replay.set_defaults(handler=_cmd_replay)


def _add_show(commands: argparse._SubParsersAction[_Parser]) -> None:
    show = commands.add_parser("show", help="print bars from a Parquet output directory")
    show.add_argument("dir", type=Path, metavar="DIR", help="a directory written by `replay` or `run --parquet-dir`")
    show.add_argument("--spec", help="only bars of this spec, as written (e.g. time:1m)")
    show.add_argument("--symbol", help="only bars of this symbol")
    show.add_argument("--rows", type=_positive_int, default=10, metavar="N", help="how many bars (default 10)")
    show.add_argument(
        "--all", action="store_true", help="include bars without trades (quote-only bars; hidden by default)"
    )
    show.set_defaults(handler=_cmd_show)


def _add_columns(commands: argparse._SubParsersAction[_Parser]) -> None:
    columns = commands.add_parser("columns", help="print every bar column: its group, type and meaning (Markdown)")
    columns.set_defaults(handler=_cmd_columns)


def _add_synth(commands: argparse._SubParsersAction[_Parser]) -> None:
    synth = commands.add_parser("synth", help="write a seeded synthetic feed (invented venue and symbols)")
    synth.add_argument("--out", required=True, type=Path, metavar="FILE", help="output file (.gz to compress)")
    synth.add_argument(
        "--seed", type=int, default=7, metavar="N", help="random seed; same seed, same bytes (default 7)"
    )
    synth.add_argument(
        "--symbols", type=_positive_int, default=12, metavar="N", help="invented listings, 1 to 24 (default 12)"
    )
    synth.add_argument(
        "--messages", type=_positive_int, default=250_000, metavar="N", help="valid messages (default 250000)"
    )
    synth.add_argument(
        "--duration", type=_duration_ms, default=75 * 60_000, metavar="DUR", help="event time covered (default 75m)"
    )
    synth.add_argument(
        "--malformed", type=_count, default=0, metavar="N", help="mix in N malformed records (default 0)"
    )
    synth.add_argument(
        "--order-flow",
        action="store_true",
        help="persistent trade signs, midpoint matches and price impact (default: independent sides at the touch)",
    )
    synth.add_argument(
        "--depth",
        type=_count,
        default=0,
        metavar="N",
        help="N depth levels per side instead of top-of-book fields (default 0: top of book)",
    )
    synth.set_defaults(handler=_cmd_synth)


def _add_run(commands: argparse._SubParsersAction[_Parser]) -> None:
    run = commands.add_parser("run", help="run the live service on Kafka")
    run.add_argument("--config", metavar="FILE", help=_CONFIG_HELP)
    run.add_argument("--bootstrap", metavar="HOST:PORT[,...]", help=_BOOTSTRAP_HELP)
    run.add_argument("--input-topic", action="append", metavar="TOPIC", help="input topic, repeatable (default ticks)")
    run.add_argument("--output-topic", metavar="TOPIC", help="bus sink: publish bars to this topic")
    run.add_argument("--group", metavar="ID", help="consumer group id (default barsmith)")
    run.add_argument("--client-id", metavar="ID", help="client id shown to the brokers (default barsmith)")
    run.add_argument("--bars", action="append", metavar="SPEC", help="bar spec, repeatable (default time:1m)")
    run.add_argument("--lateness", type=_duration_ms, metavar="DUR", help="allowed lateness (default 2s)")
    run.add_argument("--idle-close", type=_duration_ms, metavar="DUR", help="idle rule delay (default 10s)")
    run.add_argument("--parquet-dir", type=Path, metavar="DIR", help="Parquet sink: write bars here")
    run.add_argument(
        "--metrics-port",
        type=_port,
        metavar="PORT",
        help=f"HTTP port of /metrics, /healthz, /readyz (default {DEFAULT_METRICS_PORT}; 0: any free port)",
    )
    run.add_argument(
        "--workers", type=_positive_int, metavar="N", help="processes in the group on this host (default 1)"
    )
    run.add_argument(
        "--exit-when-idle", type=_duration_ms, metavar="DUR", help="drain mode: close open bars and exit after DUR idle"
    )
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


def _add_publish(commands: argparse._SubParsersAction[_Parser]) -> None:
    publish = commands.add_parser("publish", help="publish a recorded feed to a topic, keyed by symbol")
    publish.add_argument("files", nargs="+", type=Path, metavar="FILE", help="recorded feeds, in order")
    publish.add_argument("--bootstrap", required=True, metavar="HOST:PORT[,...]", help=_BOOTSTRAP_HELP)
    publish.add_argument("--topic", required=True, metavar="TOPIC", help="the topic (created if missing)")
    publish.add_argument(
        "--partitions",
        type=_positive_int,
        default=8,
        metavar="N",
        help="partitions if the topic is created (default 8)",
    )
    publish.add_argument(
        "--speed",
        type=float,
        metavar="X",
        help="pace at X times event time (1 = real time; default: as fast as possible)",
    )
    publish.add_argument(
        "--batch", type=_positive_int, default=1, metavar="N", help="ticks per record, as arrays (default 1)"
    )
    publish.add_argument(
        "--shift-to-now",
        action="store_true",
        help="shift every event time by one offset so the feed starts now (spacing kept)",
    )
    publish.set_defaults(handler=_cmd_publish)


def _add_record(commands: argparse._SubParsersAction[_Parser]) -> None:
    record = commands.add_parser("record", help="capture a topic to a replayable file")
    record.add_argument("--bootstrap", required=True, metavar="HOST:PORT[,...]", help=_BOOTSTRAP_HELP)
    record.add_argument("--topic", required=True, metavar="TOPIC", help="the topic to capture")
    record.add_argument("--out", required=True, type=Path, metavar="FILE", help="output file (.gz to compress)")
    record.add_argument(
        "--idle", type=_duration_ms, default=5000, metavar="DUR", help="stop after DUR without data (default 5s)"
    )
    record.add_argument(
        "--plain", action="store_true", help="a bare concatenation of the records (default: checksummed blocks)"
    )
    record.set_defaults(handler=_cmd_record)


def _add_config(commands: argparse._SubParsersAction[_Parser]) -> None:
    config = commands.add_parser("config", help="inspect settings")
    config_commands = config.add_subparsers(
        dest="config_command", required=True, parser_class=_Parser, metavar="ACTION", help="check"
    )
    check = config_commands.add_parser(
        "check", help="print the effective settings (defaults < TOML < environment), secrets masked"
    )
    check.add_argument("file", nargs="?", metavar="FILE", help=_CONFIG_HELP)
    check.set_defaults(handler=_cmd_config_check)


def _add_bench(commands: argparse._SubParsersAction[_Parser]) -> None:
    bench = commands.add_parser(
        "bench", help="measure start-up, replay against msgpack decoding and, with --bootstrap, the service"
    )
    bench.add_argument(
        "--ticks", type=_positive_int, default=2_000_000, metavar="N", help="ticks to generate (default 2000000)"
    )
    bench.add_argument(
        "--symbols",
        type=_positive_int,
        default=20,
        metavar="N",
        help="invented listings, 1 to 24 (default 20; the bus benchmark always uses 20)",
    )
    bench.add_argument("--seed", type=int, default=11, metavar="N", help="seed of the generated feed (default 11)")
    bench.add_argument("--bootstrap", metavar="HOST:PORT", help="also benchmark the service through this broker")
    bench.set_defaults(handler=_cmd_bench)


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
        flags=_SETTING_FLAGS,
    )
    if progress is not None:
        progress.close()
    if not args.quiet:
        for line in summary.lines():
            print(line, file=sys.stderr)
    if summary.interrupted:
        return EXIT_INTERRUPTED
    if summary.stats.accepted == 0 and not args.allow_empty:
        print(f"barsmith replay: failed: {_nothing_accepted(args.files, summary.stats, args.out)}", file=sys.stderr)
        return EXIT_FAILURE
    if not args.quiet:
        print(f"bars written to {args.out}", file=sys.stderr)
    return EXIT_OK


def _nothing_accepted(files: Sequence[str], stats: EngineStats, out: Path) -> str:
    """Why a replay that accepted no tick failed, in one line."""
    names = ", ".join(Path(f).name for f in files)
    rejected = sum(stats.rejected.values())
    if stats.records == 0 and rejected == 0:
        what = "it holds no records"
    else:
        reasons = ", ".join(f"{reason} {count:,}" for reason, count in sorted(stats.rejected.items()))
        what = f"{rejected:,} record(s) rejected: {reasons}; see {out / '_rejects.parquet'}"
    return (
        f"no tick was accepted from {names} ({what}); is it a feed of msgpack tick maps? "
        "(--allow-empty makes this exit 0)"
    )


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

    settings = load_settings(args.config, flags=_SETTING_FLAGS, **_service_overrides(args))
    configure_logging(settings.service.log_json)
    if settings.service.workers > 1:
        argv = list(sys.argv[1:] if args.argv is None else args.argv)
        return run_workers(_worker_commands(argv, settings.service.workers, settings.metrics.port))
    summary = run_service(settings)
    for line in summary.lines():
        print(line, file=sys.stderr)
    return EXIT_OK


def _worker_commands(argv: list[str], count: int, base_port: int | None) -> list[list[str]]:
    """``barsmith run`` with the same arguments, once per worker: ``--workers 1`` and,
    when the metrics port is a fixed one, port base+i for worker i."""
    drop = ("--workers", "--metrics-port") if base_port else ("--workers",)
    common = [sys.executable, "-m", "barsmith", *_without_flags(argv, drop), "--workers", "1"]
    if not base_port:
        return [list(common) for _ in range(count)]
    return [[*common, "--metrics-port", str(base_port + index)] for index in range(count)]


def _without_flags(argv: list[str], flags: tuple[str, ...]) -> list[str]:
    """``argv`` without ``flags`` and their values (``--flag V`` and ``--flag=V``)."""
    out: list[str] = []
    skip = False
    for arg in argv:
        if skip:
            skip = False
            continue
        if arg in flags:
            skip = True
            continue
        if arg.startswith(tuple(f"{flag}=" for flag in flags)):
            continue
        out.append(arg)
    return out


def _kafka_for(bootstrap: str) -> KafkaSettings:
    from barsmith.settings import load_settings

    servers = [s.strip() for s in bootstrap.split(",") if s.strip()]
    settings = load_settings(flags=_SETTING_FLAGS, kafka={"bootstrap_servers": servers})
    return settings.kafka


def _cmd_publish(args: argparse.Namespace) -> int:
    import asyncio

    from barsmith.sources.files import check_input_paths
    from barsmith.tools.feeds import publish_feed

    if args.speed is not None and args.speed <= 0:
        raise ConfigError("--speed must be > 0")
    files = check_input_paths(args.files)
    kafka = _kafka_for(args.bootstrap)
    summary = asyncio.run(
        publish_feed(files, kafka, args.topic, args.partitions, args.speed, args.batch, shift_to_now=args.shift_to_now)
    )
    shifted = f"; event times shifted by {summary.shift_ns / 1e9:+,.0f} s" if args.shift_to_now else ""
    print(
        f"published {summary.ticks:,} ticks in {summary.records:,} records to {args.topic} "
        f"in {summary.seconds:.1f} s ({summary.skipped} unreadable span(s) skipped{shifted})",
        file=sys.stderr,
    )
    return EXIT_OK


def _cmd_record(args: argparse.Namespace) -> int:
    import asyncio

    from barsmith.tools.feeds import record_topic

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
    from barsmith.tools.synth import MAX_SYMBOLS, SynthConfig, write_feed

    if args.symbols > MAX_SYMBOLS:
        raise ConfigError(f"--symbols: at most {MAX_SYMBOLS} (the generator's invented listings)")
    cfg = SynthConfig(
        seed=args.seed,
        symbols=args.symbols,
        messages=args.messages,
        duration_s=args.duration / 1000.0,
        malformed=args.malformed,
        order_flow=args.order_flow,
        depth=args.depth,
    )
    size = write_feed(args.out, cfg)
    print(f"wrote {args.messages:,} messages ({size:,} bytes uncompressed) to {args.out}", file=sys.stderr)
    return EXIT_OK


def _cmd_show(args: argparse.Namespace) -> int:
    import pandas as pd

    from barsmith.bars.spec import shown_columns
    from barsmith.tools.show import select_bars

    shown = select_bars(args.dir, spec=args.spec, symbol=args.symbol, with_trades_only=not args.all)
    frame = shown.frame
    hidden = f" ({shown.hidden:,} without trades hidden; --all shows them)" if shown.hidden else ""
    if frame.empty:
        print(f"{shown.selected:,} bars in {args.dir}{hidden}, none to show")
        return EXIT_OK
    columns = [name for name in shown_columns() if name in frame.columns]
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        print(f"{shown.selected:,} bars in {args.dir}{hidden}; the first {min(args.rows, len(frame))} by start:")
        print(frame[columns].head(args.rows).to_string(index=False))
    return EXIT_OK


def _cmd_columns(args: argparse.Namespace) -> int:
    from barsmith.bars.spec import column_table

    print(column_table())
    return EXIT_OK


def _cmd_bench(args: argparse.Namespace) -> int:
    from barsmith.tools.bench import run_bench
    from barsmith.tools.synth import MAX_SYMBOLS

    if args.symbols > MAX_SYMBOLS:
        raise ConfigError(f"--symbols: at most {MAX_SYMBOLS} (the generator's invented listings)")
    for line in run_bench(args.ticks, args.symbols, args.seed):
        print(line, flush=True)
    if args.bootstrap:
        from barsmith.tools.bench_bus import run_bus_bench

        for line in run_bus_bench(args.bootstrap, args.ticks, args.seed):
            print(line, flush=True)
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
