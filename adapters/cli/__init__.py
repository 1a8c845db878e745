"""The ``leadline`` command line. Each subcommand lives in its own module.

The subcommand modules (``score``, ``run``, ``demo``, ``check_config``,
``events``, ``export``, ``notes``, ``status``, with ``review`` and
``formats`` shared by the review commands) are internal: what they offer is
the command line. Run it as ``leadline``, ``python -m leadline`` or
``python -m leadline.adapters.cli``.
"""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import PackageNotFoundError, version

from leadline.detector.errors import LeadlineError

from . import check_config, demo, events, export, notes, replay, report, run, score, status, summary, tune
from .exit_codes import EX_USAGE

__all__ = ["build_parser", "installed_version", "main"]


def installed_version() -> str:
    """The version of the installed ``leadline`` distribution."""
    try:
        return version("leadline")
    except PackageNotFoundError:
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="leadline",
        description="Advisory anomaly alarms for telemetry feeds. Alarms support, and never replace, "
                    "operator judgment; leadline is not a safety function.",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {installed_version()}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    score.add_parser(subparsers)
    run.add_parser(subparsers)
    demo.add_parser(subparsers)
    check_config.add_parser(subparsers)
    events.add_parser(subparsers)
    notes.add_parser(subparsers)
    status.add_parser(subparsers)
    export.add_parser(subparsers)
    summary.add_parser(subparsers)
    report.add_parser(subparsers)
    replay.add_parser(subparsers)
    tune.add_parser(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    words = sys.argv[1:] if argv is None else argv
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        if exc.code == 2 and "run" in words[:1]:
            return EX_USAGE  # `leadline run` exits per sysexits.h (adapters/exit_codes.py)
        raise
    if not getattr(args, "handler", None):
        parser.print_help()
        return 2
    try:
        return int(args.handler(args) or 0)
    except LeadlineError as exc:
        print(f"leadline {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return 0

