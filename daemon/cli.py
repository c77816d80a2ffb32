"""Command line: ``arxwatch <command>``.

Logging handlers are set up here and nowhere else.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from importlib.metadata import PackageNotFoundError, version

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
    return parser


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
    except BrokenPipeError:
        # The reader went away (e.g. piped into head): not an error of ours.
        # Point stdout at devnull so the interpreter's final flush is quiet.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    raise AssertionError(f"unhandled command {args.command!r}")  # argparse enforces choices


if __name__ == "__main__":
    sys.exit(main())
