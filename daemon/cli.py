"""Command line: ``arxwatch <command>``.

Logging handlers are set up here and nowhere else.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from collections.abc import Callable
from importlib.metadata import PackageNotFoundError, version

from arxwatch.daemon.config import Config, ConfigError, load_config
from arxwatch.daemon.demo import run_demo


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
        default="warning",
        choices=["debug", "info", "warning", "error"],
        help="logging threshold (default: warning)",
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    demo = commands.add_parser(
        "demo",
        help="simulate a fictional air handler and show baseline and live read-out",
        description="Fit a baseline on a simulated commissioning window, then track a "
        "simulated fouling coil with the live estimator. Needs no set-up.",
    )
    demo.add_argument(
        "--days", type=_positive_float, default=4.0, help="simulated days of operation (default: 4)"
    )
    demo.add_argument("--seed", type=int, default=7, help="random seed (default: 7)")
    check = commands.add_parser(
        "check",
        help="load and validate a config file without connecting",
        description="Read the config file, validate it and print a summary (never a "
        "secret). Exit status 0 if valid, 2 if not.",
    )
    check.add_argument("--config", required=True, metavar="FILE", help="YAML config file")
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
        for signal in asset_class.inputs:
            emit(f"    input  {signal.signal} ({signal.name}, {signal.unit})")
        if asset_class.mode is not None:
            emit(f"    mode   {asset_class.mode.signal}")
        emit(f"    model  {model}")
    emit(f"metrics: http://{config.metrics.listen}/metrics")
    emit(f"state: {config.state.path}, checkpoint every {config.state.checkpoint_every_s:g} s")


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0.5 <= value <= 60.0:
        raise argparse.ArgumentTypeError(f"expected a value from 0.5 to 60, got {value}")
    return value


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``arxwatch`` command; returns the exit status."""
    args = build_parser().parse_args(argv)
    logging.basicConfig(
        level=getattr(logging, args.log_level.upper()),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        stream=sys.stderr,
    )
    try:
        if args.command == "demo":
            return run_demo(print, days=args.days, seed=args.seed)
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
