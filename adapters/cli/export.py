"""``leadline export``: every event of a time window with its notes, as CSV or JSON, for records."""

from __future__ import annotations

import sys
from typing import TextIO

from leadline.detector.errors import DataError

from . import review
from ..sinks.file_modes import open_private_text
from .review import add_store_options, add_window_options, open_review, resolve_window
from .events import NO_FILTERS, fetch, write_listing


def run_export(args, out: TextIO | None = None) -> int:
    if not (args.since or args.shift):
        raise DataError("export needs a window: --since TIME (and optionally --until TIME), or --shift WHICH")
    now = review.utc_now()
    with open_review(args) as rv:
        window = resolve_window(args, rv, now, None)
        events = fetch(rv, window, NO_FILTERS)
        if args.out:
            try:
                with open_private_text(args.out) as handle:  # a new file gets mode 0600
                    n = write_listing(events, args.format, handle, rv, window, NO_FILTERS)
            except OSError as exc:
                raise DataError(f"--out {args.out}: cannot write: {exc.strerror}") from exc
            print(f"leadline export: {n} event{'s' if n != 1 else ''} written to {args.out}", file=sys.stderr)
        else:
            write_listing(events, args.format, out or sys.stdout, rv, window, NO_FILTERS)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "export", help="write every event of a window, with its notes, as CSV or JSON",
        description="Write all events that started in a time window, with their acknowledgements and "
                    "comments, as CSV or JSON (times in UTC). Each record carries the advisory caution.")
    add_store_options(p)
    add_window_options(p, None)
    p.add_argument("--format", choices=("csv", "json"), default="csv", help="csv (default) or json")
    p.add_argument("--out", metavar="FILE", help="write here instead of standard output")
    p.set_defaults(handler=run_export)
