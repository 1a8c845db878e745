"""``leadline export --format xlsx``: the events as a workbook a spreadsheet opens cleanly.

Sheet ``Events``: the columns of the CSV export (:data:`.formats.CSV_COLUMNS`
without ``caution``), times as real date cells in UTC (the header says so),
numbers as numbers, the header row frozen and filtered. Sheet ``Caution``:
the advisory caution and the export's window. Text cells are written as
strings, never as formulas (XlsxWriter's ``write_string``), so a feed id or
a note starting with ``=`` stays text. Needs XlsxWriter (the ``report`` extra).
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Any, BinaryIO, Iterable

from leadline.detector.errors import DataError
from leadline.detector.events import CAUTION

from ..store.records import StoredEvent
from .formats import CSV_COLUMNS, _first_ack, _note_line, event_record

TIME_COLUMNS = ("start", "end", "acknowledged_at", "created_at", "updated_at")
NUMBER_COLUMNS = ("id", "peak_abs_z", "value_at_onset", "forecast_at_onset", "lower_at_onset", "upper_at_onset",
                  "model_version")
COLUMNS = tuple(c for c in CSV_COLUMNS if c != "caution")


def _naive_utc(text: str | None) -> datetime | None:
    if not text:
        return None
    return datetime.fromisoformat(text).astimezone(timezone.utc).replace(tzinfo=None)


def write_xlsx(events: Iterable[StoredEvent], out: BinaryIO, window: dict[str, Any]) -> int:
    """Write the workbook to the binary stream ``out``; return the number of events."""
    try:
        import xlsxwriter
    except ImportError as exc:
        raise DataError("--format xlsx needs XlsxWriter: pip install 'leadline[report]'") from exc
    book = xlsxwriter.Workbook(out, {"in_memory": True, "strings_to_formulas": False, "strings_to_urls": False,
                                     "strings_to_numbers": False})
    bold = book.add_format({"bold": True})
    when = book.add_format({"num_format": "yyyy-mm-dd hh:mm:ss"})
    sheet = book.add_worksheet("Events")
    headers = [f"{c} (UTC)" if c in TIME_COLUMNS else c for c in COLUMNS]
    for j, h in enumerate(headers):
        sheet.write_string(0, j, h, bold)
    n = 0
    for i, stored in enumerate(events, start=1):
        r = event_record(stored)
        ack = _first_ack(stored)
        values: dict[str, Any] = {**r, "acknowledged": "yes" if r["acknowledged"] else "no",
                                  "acknowledged_by": ack.operator if ack else "",
                                  "acknowledged_at": ack.at.isoformat() if ack else None,
                                  "notes": "\n".join(_note_line(x) for x in stored.notes),
                                  "parameters": json.dumps(r["parameters"], sort_keys=True)}
        for j, c in enumerate(COLUMNS):
            v = values.get(c)
            if c in TIME_COLUMNS:
                moment = _naive_utc(v)
                if moment is not None:
                    sheet.write_datetime(i, j, moment, when)
            elif c in NUMBER_COLUMNS:
                if v is not None:
                    sheet.write_number(i, j, v)
            elif v is not None:
                sheet.write_string(i, j, str(v))
        n += 1
    sheet.freeze_panes(1, 0)
    sheet.autofilter(0, 0, max(n, 1), len(COLUMNS) - 1)
    for c in TIME_COLUMNS:
        sheet.set_column(COLUMNS.index(c), COLUMNS.index(c), 20)
    note = book.add_worksheet("Caution")
    note.write_string(0, 0, CAUTION, bold)
    note.write_string(2, 0, f"Events that started from {window.get('since')} to {window.get('until') or 'now'} "
                            "(UTC); times on the Events sheet are UTC.")
    note.set_column(0, 0, 120)
    book.close()
    return n
