"""Command line: ``arxwatch <command>``.

Logging handlers are set up here and nowhere else.
"""

from __future__ import annotations

import argparse
import logging
import math
import os
import signal
import sys
import threading
from collections.abc import Callable
from importlib.metadata import PackageNotFoundError, version

from arxwatch.daemon.capture import run_capture
from arxwatch.daemon.commission import run_baselines
from arxwatch.daemon.config import Config, ConfigError, load_config
from arxwatch.daemon.demo import DemoOptions, parse_duration, run_demo
from arxwatch.daemon.logs import configure_logging
from arxwatch.daemon.replay import run_replay
from arxwatch.daemon.service import StartError, run_service


def _version() -> str:
    try:
        return version("arxwatch")
    except PackageNotFoundError:  # running from a source tree without install
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser with every sub-command."""
    parser = argparse.ArgumentParser(
        prog="arxwatch",
        description="Listen-only drift monitor for HVAC equipment (advisory only; "
        "not a life-safety system).",
    )
    parser.add_argument("--version", action="version", version=f"arxwatch {_version()}")
    parser.add_argument(
        "--log-level",
        default=None,
        choices=["debug", "info", "warning", "error"],
        help="logging threshold (default: warning; for run, the config's logging.level)",
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    demo = commands.add_parser(
        "demo",
        help="run the service end to end on a simulated building with scheduled faults",
        description="Start an MQTT broker on 127.0.0.1 (mosquitto when installed, else an "
        "embedded one), fit baselines on two simulated fault-free days of an invented "
        "site, run the real service against the site's points published with time "
        "accelerated, and print alerts as they are raised and cleared, then which "
        "scheduled faults were caught. Needs no set-up; leaves nothing behind. Ctrl-C "
        "stops it early.",
    )
    demo.add_argument(
        "--broker",
        choices=["auto", "mosquitto", "embedded"],
        default="auto",
        help="broker to start (default: auto, mosquitto when installed, else embedded)",
    )
    demo.add_argument(
        "--speed",
        type=_speed,
        default=1200.0,
        metavar="X",
        help="simulated seconds per wall second (default: 1200, a simulated minute every 0.05 s)",
    )
    demo.add_argument(
        "--duration",
        type=_duration,
        default="14h",
        metavar="SIMULATED",
        help="simulated time to run after go-live, with a unit m, h or d (default: 14h, "
        "past the last scheduled fault)",
    )
    demo.add_argument("--seed", type=int, default=7, help="random seed (default: 7)")
    check = commands.add_parser(
        "check",
        help="load and validate a config file without connecting",
        description="Read the config file, validate it and print a summary (never a "
        "secret). Exit status 0 if valid, 2 if not.",
    )
    check.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
    run = commands.add_parser(
        "run",
        help="run the service: subscribe, judge, publish advisory alerts and metrics",
        description="Run the drift monitor as a service until SIGTERM or Ctrl-C. Listens "
        "only: it never writes to a controller. Exit status 2 for a configuration "
        "error, 1 when the service cannot start.",
    )
    run.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
    replay = commands.add_parser(
        "replay",
        help="feed a recorded file (trend export CSV or capture) through the same processing",
        description="Replay a wide CSV trend export (first column the time, one column per "
        "point headed by its MQTT topic) or a JSON Lines capture through the pipeline "
        "'run' uses, and report what would have been raised. Exit status 2 for a bad "
        "config or input file.",
    )
    replay.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
    replay.add_argument("--input", required=True, metavar="FILE", help="CSV or .jsonl (.gz too)")
    replay.add_argument(
        "--alerts",
        metavar="OUT.jsonl",
        help="write every alert record (schema arxwatch.alert/1) as JSON Lines; - for stdout",
    )
    replay.add_argument(
        "--format",
        choices=["auto", "csv", "capture"],
        default="auto",
        help="input format (default: by extension, else by content)",
    )
    replay.add_argument(
        "--on-bad-line",
        choices=["stop", "skip"],
        default="stop",
        help="at an unreadable line: stop with its file and line number (default), or "
        "count it and go on",
    )
    replay.add_argument(
        "--zone",
        default="UTC",
        metavar="NAME",
        help="time zone of CSV times written without one, e.g. Europe/Dublin (default: UTC)",
    )
    replay.add_argument(
        "--report",
        metavar="OUT.html",
        help="write a self-contained HTML report with plots per asset (needs the optional "
        "extra: pip install 'arxwatch[report]')",
    )
    capture = commands.add_parser(
        "capture",
        help="record live MQTT traffic to a JSON Lines capture for a later replay",
        description="Subscribe to the topics of every asset class in the config and append "
        'each message to a JSON Lines capture ({"ts", "topic", "payload"} per line), '
        "acknowledging it only once written. Uses its own client id and a session that ends "
        "with it, so a running 'arxwatch run' keeps its own. Publishes nothing but its own "
        "retained status. Stops on Ctrl-C, SIGTERM or after --duration. Exit status 2 for a "
        "bad config or output file, 1 when it cannot connect.",
    )
    capture.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
    capture.add_argument(
        "--output", required=True, metavar="OUT.jsonl", help="capture file, appended to (.gz too)"
    )
    capture.add_argument(
        "--duration", type=_seconds, metavar="SECONDS", help="stop after this long (default: never)"
    )
    capture.add_argument(
        "--client-id",
        metavar="ID",
        help="MQTT client id (default: the config's with '-capture' appended)",
    )
    baselines = commands.add_parser(
        "baselines",
        help="fit commissioning baselines from a recorded file and write baseline files",
        description="Feed a time range of a trend export CSV or a capture through the "
        "alignment 'run' uses, fit a baseline per asset (and operating mode) with the "
        "class's model orders, print a table of the fits and write the accepted ones "
        "to baseline files that 'run' and 'replay' load. Exit status 2 for a bad config, "
        "input or time range, 1 when a file cannot be written or exists without --force.",
    )
    baselines.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
    baselines.add_argument("--input", required=True, metavar="FILE", help="CSV or .jsonl (.gz too)")
    baselines.add_argument(
        "--from", dest="start", metavar="TIME", help="first time used (ISO 8601 or epoch seconds)"
    )
    baselines.add_argument(
        "--to", dest="end", metavar="TIME", help="last time used (ISO 8601 or epoch seconds)"
    )
    where = baselines.add_mutually_exclusive_group()
    where.add_argument(
        "--output-dir", metavar="DIR", help="write DIR/<asset class>.json for every class"
    )
    where.add_argument(
        "--write",
        action="store_true",
        help="write each class's baseline file named in the config (baseline.file)",
    )
    baselines.add_argument(
        "--force", action="store_true", help="replace baseline files that exist already"
    )
    baselines.add_argument(
        "--format",
        choices=["auto", "csv", "capture"],
        default="auto",
        help="input format (default: by extension, else by content)",
    )
    baselines.add_argument(
        "--on-bad-line",
        choices=["stop", "skip"],
        default="stop",
        help="at an unreadable line: stop with its file and line number (default), or "
        "count it and go on",
    )
    baselines.add_argument(
        "--zone",
        default="UTC",
        metavar="NAME",
        help="time zone of --from/--to and of CSV times written without one (default: UTC)",
    )
    return parser


def summarise(config: Config, emit: Callable[[str], object]) -> None:
    """Write a short summary of a validated config, without secrets.

    Parameters
    ----------
    config : Config
        Validated configuration.
    emit : callable
        Called with each line, e.g. :func:`print`.
    """
    broker = config.broker
    emit(f"config {config.source}: valid")
    emit(f"broker: {broker.endpoint}, client id {broker.client_id}, qos {broker.qos}")
    if broker.password_file is not None:
        emit(f"  username {broker.username}, password from file {broker.password_file}")
    elif broker.password_env is not None:
        emit(
            f"  username {broker.username}, password from environment variable "
            f"{broker.password_env}"
        )
    elif broker.username is not None:
        emit(f"  username {broker.username}, no password")
    emit(f"status topic: {config.topics.status}")
    emit(f"alerts: {config.topics.events_topic('<asset>')}, {config.topics.state_topic('<asset>')}")
    emit("subscriptions:")
    for subscription in config.subscriptions():
        emit(f"  {subscription}")
    emit("asset classes:")
    for asset_class in config.asset_classes:
        order = asset_class.model.order
        model = (
            "auto (chosen from the baseline)"
            if order is None
            else f"na={order.na} nb={list(order.nb)} nk={list(order.nk)} constant={order.constant}"
        )
        emit(
            f"  {asset_class.name}: {asset_class.pattern.text} -> {asset_class.asset_id}, "
            f"every {asset_class.sample_period_s:g} s"
        )
        emit(
            f"    output {asset_class.output.signal} ({asset_class.output.name}, "
            f"{asset_class.output.unit})"
        )
        for item in asset_class.inputs:
            emit(f"    input  {item.signal} ({item.name}, {item.unit})")
        if asset_class.mode is not None:
            emit(f"    mode   {asset_class.mode.signal}")
        emit(f"    model  {model}")
    emit(f"metrics: http://{config.metrics.listen}/metrics")
    emit(f"state: {config.state.path}, checkpoint every {config.state.checkpoint_every_s:g} s")


def _speed(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 1.0 <= value <= 100_000.0:
        raise argparse.ArgumentTypeError(f"expected a speed from 1 to 100000, got {text!r}")
    return value


def _duration(text: str) -> float:
    try:
        return parse_duration(text)
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err)) from None


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected seconds, got {text!r}") from None
    if not (math.isfinite(value) and value > 0.0):
        raise argparse.ArgumentTypeError(f"expected a number of seconds > 0, got {text!r}")
    return value


def _run(config_path: str, log_level: str | None) -> int:
    """``arxwatch run``: serve until SIGTERM or SIGINT."""
    try:
        config = load_config(config_path)
    except ConfigError as err:
        print(f"arxwatch run: {err}", file=sys.stderr)
        return 2
    configure_logging(log_level or config.logging.level, config.logging.format, sys.stderr)
    stop = threading.Event()

    def request_stop(signum: int, frame: object) -> None:
        logging.getLogger(__name__).info("signal %d: stopping", signum)
        stop.set()

    signal.signal(signal.SIGTERM, request_stop)
    signal.signal(signal.SIGINT, request_stop)
    try:
        run_service(config, os.environ, stop)
    except ConfigError as err:
        print(f"arxwatch run: {err}", file=sys.stderr)
        return 2
    except StartError as err:
        print(f"arxwatch run: cannot start: {err}", file=sys.stderr)
        return 1
    return 0


def _demo(args: argparse.Namespace) -> int:
    """``arxwatch demo``: run until done, Ctrl-C or SIGTERM."""
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda signum, frame: stop.set())
    signal.signal(signal.SIGINT, lambda signum, frame: stop.set())
    options = DemoOptions(
        broker=args.broker, speed=args.speed, duration_s=args.duration, seed=args.seed
    )
    return run_demo(options, lambda line: print(line, flush=True), stop)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``arxwatch`` command; returns the exit status."""
    args = build_parser().parse_args(argv)
    if args.command == "run":
        return _run(args.config, args.log_level)
    if args.command == "replay":
        configure_logging(args.log_level or "warning", "text", sys.stderr)
        return run_replay(
            args.config,
            args.input,
            alerts_path=args.alerts,
            kind=args.format,
            on_bad_line=args.on_bad_line,
            zone=args.zone,
            out=sys.stdout,
            err=sys.stderr,
            report_path=args.report,
        )
    if args.command == "capture":
        configure_logging(args.log_level or "warning", "text", sys.stderr)
        return run_capture(
            args.config,
            args.output,
            duration_s=args.duration,
            client_id=args.client_id,
            out=sys.stdout,
            err=sys.stderr,
        )
    if args.command == "baselines":
        configure_logging(args.log_level or "warning", "text", sys.stderr)
        return run_baselines(
            args.config,
            args.input,
            start=args.start,
            end=args.end,
            output_dir=args.output_dir,
            write=args.write,
            force=args.force,
            kind=args.format,
            on_bad_line=args.on_bad_line,
            zone=args.zone,
            out=sys.stdout,
            err=sys.stderr,
        )
    configure_logging(args.log_level or "warning", "text", sys.stderr)
    try:
        if args.command == "demo":
            return _demo(args)
        if args.command == "check":
            try:
                config = load_config(args.config)
            except ConfigError as err:
                print(f"arxwatch check: {err}", file=sys.stderr)
                return 2
            summarise(config, print)
            return 0
    except BrokenPipeError:
        # The reader went away (e.g. piped into head): not an error of ours.
        # Point stdout at devnull so the interpreter's final flush is quiet.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    raise AssertionError(f"unhandled command {args.command!r}")  # argparse enforces choices


if __name__ == "__main__":
    sys.exit(main())
