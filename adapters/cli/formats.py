"""Events written as a table, CSV or JSON (``leadline events``, ``leadline export``, ``leadline score``).

Every format ends with the caution (:data:`~leadline.detector.events.CAUTION`):

* **table**: the last line of the output;
* **CSV**: UTF-8 (a byte order mark first with ``export --bom``, for
  spreadsheets that guess the encoding otherwise), a header row, then one
  row per event; the caution is the last column of every row, and there is
  no trailer line, so every line after the header is a record and a
  spreadsheet opens the file without a stray row;
* **xlsx** (``export --format xlsx``, :mod:`.spreadsheet`): real date cells,
  a frozen header row, the caution on a sheet of its own;
* **JSON**: one object ``{"window": ..., "filters": ..., "count": n,
  "events": [...], "caution": "..."}``, the caution as its last member and
  in each event. Events that were never stored (``leadline score
  --events-out``) are written the same way, without ``window`` and
  ``filters`` and without the store's fields.

An event's fields in CSV and JSON carry the names of the alarm payload
published over MQTT (:func:`leadline.adapters.sinks.alarm_publisher.event_payload`),
plus ``incident_start`` (the key of the event's incident with its feed), ``id``, ``acknowledged``, ``notes``, ``created_at`` and ``updated_at``.
Times are UTC ISO 8601; NaN is an empty CSV cell and JSON ``null``.

Safe output: table cells and headings show control, escape and bidi
characters escaped (:func:`~leadline.adapters.sinks.safe_text.safe_text`); CSV
text cells that a spreadsheet would run as a formula get a leading ``'``
(:func:`~leadline.adapters.sinks.safe_text.csv_text_cell`), numeric cells are
written as numbers and left alone. The store is never altered.
"""

from __future__ import annotations

import csv
import json
import math
from datetime import tzinfo
from typing import Any, Iterable, Mapping, Sequence, TextIO

from leadline.detector.events import CAUTION, AlarmEvent

from .review import iso, print_caution, show_time
from ..sinks.safe_text import csv_text_cell, safe_text
from .words import plural, show_abs_z, show_value
from ..store.records import Note, StoredEvent

CSV_COLUMNS = (
    "id", "feed_id", "rule", "severity", "state", "start", "end", "incident_start", "peak_abs_z", "value_at_onset",
    "forecast_at_onset", "lower_at_onset", "upper_at_onset", "model_version", "acknowledged", "acknowledged_by",
    "acknowledged_at", "notes", "detail", "parameters", "created_at", "updated_at", "caution",
)
TABLE_COLUMNS = ("ID", "START", "END", "FEED", "RULE", "SEVERITY", "PEAK |Z|", "VALUE", "FORECAST", "ACK", "DETAIL")
_RIGHT = {"ID", "PEAK |Z|", "VALUE", "FORECAST"}


def _number(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) else None


def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def note_record(note: Note) -> dict[str, Any]:
    out: dict[str, Any] = {"id": note.id, "kind": note.kind, "operator": note.operator, "text": note.text,
                           "at": iso(note.at)}
    if note.expires_at is not None:
        out["expires_at"] = iso(note.expires_at)
    return out


def alarm_event_record(ev: AlarmEvent) -> dict[str, Any]:
    """One engine event (not yet stored) as a JSON-ready dict, the caution last."""
    return {
        "feed_id": ev.feed_id,
        "rule": ev.rule,
        "severity": ev.severity,
        "state": "active" if ev.end is None else "cleared",
        "start": iso(ev.start),
        "end": iso(ev.end),
        "incident_start": iso(ev.incident_start),
        "peak_abs_z": _number(ev.peak_abs_z),
        "value_at_onset": _number(ev.value_at_onset),
        "forecast_at_onset": _number(ev.forecast_at_onset),
        "lower_at_onset": _number(ev.lower_at_onset),
        "upper_at_onset": _number(ev.upper_at_onset),
        "parameters": _clean(ev.parameters),
        "model_version": ev.model_version,
        "detail": ev.detail,
        "caution": ev.caution,
    }


def event_record(stored: StoredEvent) -> dict[str, Any]:
    """One event as a JSON-ready dict."""
    record = alarm_event_record(stored.event)
    record["incident_start"] = iso(stored.incident_start)
    caution = record.pop("caution")
    return {
        "id": stored.id,
        **record,
        "acknowledged": stored.acknowledged,
        "notes": [note_record(n) for n in stored.notes],
        "created_at": iso(stored.created_at),
        "updated_at": iso(stored.updated_at),
        "caution": caution,
    }


def _first_ack(stored: StoredEvent) -> Note | None:
    return next((n for n in stored.notes if n.kind == "ack"), None)


def _note_line(note: Note) -> str:
    text = f": {note.text}" if note.text else ""
    return f"{iso(note.at)} {note.kind} by {note.operator}{text}"


def _cell(x: float | None) -> str:
    return "" if x is None else repr(x)


def write_csv(events: Iterable[StoredEvent], out: TextIO, bom: bool = False) -> int:
    """The events as CSV (module notes); ``bom`` writes U+FEFF first."""
    if bom:
        out.write("\ufeff")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    n = 0
    for stored in events:
        r = event_record(stored)
        ack = _first_ack(stored)
        t = csv_text_cell  # text cells only; the numeric ones stay numbers
        writer.writerow([
            r["id"], t(r["feed_id"]), t(r["rule"]), r["severity"], r["state"], r["start"], r["end"] or "",
            r["incident_start"],
            _cell(r["peak_abs_z"]), _cell(r["value_at_onset"]), _cell(r["forecast_at_onset"]),
            _cell(r["lower_at_onset"]), _cell(r["upper_at_onset"]),
            "" if r["model_version"] is None else r["model_version"],
            "yes" if r["acknowledged"] else "no", t(ack.operator) if ack else "", iso(ack.at) if ack else "",
            t("\n".join(_note_line(n) for n in stored.notes)), t(r["detail"]),
            json.dumps(r["parameters"], sort_keys=True), r["created_at"], r["updated_at"], r["caution"],
        ])
        n += 1
    return n


def write_json(events: Iterable[StoredEvent], out: TextIO, *, window: Mapping[str, Any],
               filters: Mapping[str, Any]) -> int:
    records = [event_record(e) for e in events]
    document = {"window": dict(window), "filters": dict(filters), "count": len(records), "events": records,
                "caution": CAUTION}
    json.dump(document, out, indent=2, ensure_ascii=False, allow_nan=False)
    out.write("\n")
    return len(records)


def write_alarm_events_json(events: Iterable[AlarmEvent], out: TextIO) -> int:
    """Engine events that were never stored (``leadline score``), in the JSON form of :func:`write_json`."""
    records = [alarm_event_record(e) for e in events]
    json.dump({"count": len(records), "events": records, "caution": CAUTION}, out, indent=2, ensure_ascii=False,
              allow_nan=False)
    out.write("\n")
    return len(records)


def _short(x: float | None) -> str:
    """A value to 4 significant figures (:func:`.words.show_value`); empty when absent."""
    return "" if x is None else show_value(x)


def table_rows(events: Sequence[StoredEvent], zone: tzinfo) -> list[list[str]]:
    rows = []
    for stored in events:
        ev = stored.event
        ack = _first_ack(stored)
        rows.append([
            str(stored.id), show_time(ev.start, zone), "active" if ev.end is None else show_time(ev.end, zone),
            ev.feed_id, ev.rule, ev.severity,
            show_abs_z(_number(ev.peak_abs_z)) if _number(ev.peak_abs_z) is not None else "",
            _short(_number(ev.value_at_onset)), _short(_number(ev.forecast_at_onset)),
            ack.operator if ack else "-", " ".join(ev.detail.split()),
        ])
    return rows


def write_aligned(header: Sequence[str], rows: Sequence[Sequence[str]], out: TextIO,
                  right: set[str] | frozenset[str] = frozenset()) -> None:
    """Columns padded to their widest cell; the last column is not padded."""
    rows = [[safe_text(cell) for cell in row] for row in rows]
    widths = [max([len(h), *(len(r[i]) for r in rows)]) for i, h in enumerate(header)]
    for line in [list(header), *rows]:
        cells = []
        for i, (cell, width) in enumerate(zip(line, widths)):
            if i == len(header) - 1:
                cells.append(cell)
            elif header[i] in right:
                cells.append(cell.rjust(width))
            else:
                cells.append(cell.ljust(width))
        print("  ".join(cells).rstrip(), file=out)


def write_table(events: Sequence[StoredEvent], out: TextIO, zone: tzinfo, heading: str, caution: bool = True) -> int:
    """The events as an aligned table; the caution last unless the caller prints it once itself."""
    print(safe_text(heading), file=out)
    if not events:
        print("No events.", file=out)
    else:
        write_aligned(TABLE_COLUMNS, table_rows(events, zone), out, _RIGHT)
        active = sum(1 for e in events if e.event.end is None)
        unacked = sum(1 for e in events if not e.acknowledged)
        print(f"{plural(len(events), 'event')} ({active} active, {unacked} unacknowledged).", file=out)
    if caution:
        print_caution(out)
    return len(events)
