"""``leadline export``: every event of a time window with its notes, as CSV, JSON or xlsx, for records.

CSV is UTF-8 (``--bom`` puts a byte order mark first), times ISO 8601 with
their offset (UTC), the caution in the last column of every row and no
trailer line; xlsx (:mod:`.spreadsheet`) has real date cells, a frozen header
and the caution on a sheet of its own, and needs ``--out``.
"""

from __future__ import annotations

import io
import os
import sys
from typing import TextIO

from leadline.detector.errors import DataError

from . import review
from ..sinks.file_modes import PRIVATE_FILE_MODE, open_private_text
from .review import add_store_options, add_window_options, open_review, resolve_window
from .events import NO_FILTERS, fetch, window_record, write_listing
from .formats import write_csv
from .words import plural


def _write_binary(path: str, data: bytes) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, PRIVATE_FILE_MODE)
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)


def run_export(args, out: TextIO | None = None) -> int:
    if not (args.since or args.shift):
        raise DataError("export needs a window: --since TIME (and optionally --until TIME), or --shift WHICH")
    if args.bom and args.format != "csv":
        raise DataError(f"--bom is for --format csv, not {args.format}")
    if args.format == "xlsx" and not args.out:
        raise DataError("--format xlsx needs --out FILE (a workbook is not written to a terminal)")
    now = review.utc_now()
    with open_review(args) as rv:
        window = resolve_window(args, rv, now, None)
        events = fetch(rv, window, NO_FILTERS)
        if args.format == "xlsx":
            from .spreadsheet import write_xlsx

            buffer = io.BytesIO()
            n = write_xlsx(events, buffer, window_record(window, rv))
            try:
                _write_binary(args.out, buffer.getvalue())
            except OSError as exc:
                raise DataError(f"--out {args.out}: cannot write: {exc.strerror}") from exc
        elif args.out:
            try:
                with open_private_text(args.out) as handle:  # a new file gets mode 0600
                    n = _write(events, args, handle, rv, window)
            except OSError as exc:
                raise DataError(f"--out {args.out}: cannot write: {exc.strerror}") from exc
        else:
            _write(events, args, out or sys.stdout, rv, window)
            return 0
        print(f"leadline export: {plural(n, 'event')} written to {args.out}", file=sys.stderr)
    return 0


def _write(events, args, handle: TextIO, rv, window) -> int:
    if args.format == "csv":
        return write_csv(events, handle, bom=args.bom)
    return write_listing(events, args.format, handle, rv, window, NO_FILTERS)


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "export", help="write every event of a window, with its notes, as CSV, JSON or xlsx",
        description="Write all events that started in a time window, with their acknowledgements and "
                    "comments, as CSV, JSON or an xlsx workbook (times in UTC). Each record carries the "
                    "advisory caution (CSV: its last column; xlsx: a sheet of its own).")
    add_store_options(p)
    add_window_options(p, None)
    p.add_argument("--format", choices=("csv", "json", "xlsx"), default="csv",
                   help="csv (default), json, or xlsx (needs --out and XlsxWriter, the report extra)")
    p.add_argument("--bom", action="store_true",
                   help="CSV: put a UTF-8 byte order mark first (for spreadsheets that guess the encoding)")
    p.add_argument("--out", metavar="FILE", help="write here instead of standard output")
    p.set_defaults(handler=run_export)
