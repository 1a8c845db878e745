"""The ``leadline`` command line. Each subcommand lives in its own module."""

from __future__ import annotations

import argparse
import sys

from leadline.detector.errors import LeadlineError

from . import (check_config, demo, review_events, review_export, review_notes, review_report, review_status,
               review_summary, run, score)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="leadline",
        description="Advisory anomaly alarms for telemetry feeds. Alarms support, and never replace, "
                    "operator judgment; leadline is not a safety function.",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    score.add_parser(subparsers)
    run.add_parser(subparsers)
    demo.add_parser(subparsers)
    check_config.add_parser(subparsers)
    review_events.add_parser(subparsers)
    review_notes.add_parser(subparsers)
    review_status.add_parser(subparsers)
    review_export.add_parser(subparsers)
    review_summary.add_parser(subparsers)
    review_report.add_parser(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
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


if __name__ == "__main__":
    sys.exit(main())
