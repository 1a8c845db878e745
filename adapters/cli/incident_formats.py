"""Incidents written as a table, CSV or JSON: ``leadline events`` without ``--each-event``.

One line per incident (:class:`~leadline.adapters.store.records.Incident`):
its feed, start, end (the latest end of its events, or ``active``), the
rules that fired in the order they first fired (``spike + cusum``), the
worst severity, the largest peak |z|, the id of its first event (the
incident's id, the one to type in ``leadline ack``) and how many of its
events are acknowledged. The incident's key is ``(feed_id,
incident_start)``. Every format ends with the caution, as the per-event
formats of :mod:`.formats` do.
"""

from __future__ import annotations

import csv
import json
from datetime import tzinfo
from typing import Any, Mapping, Sequence, TextIO

from leadline.detector.events import CAUTION

from .formats import _number, event_record, write_aligned
from .words import show_abs_z
from .review import iso, print_caution, show_time
from ..sinks.safe_text import csv_text_cell, safe_text
from ..store.records import Incident

CSV_COLUMNS = ("id", "feed_id", "incident_start", "end", "state", "rules", "severity", "peak_abs_z", "events",
               "event_ids", "acknowledged_events", "acknowledged", "caution")
TABLE_COLUMNS = ("ID", "START", "END", "FEED", "RULES", "SEVERITY", "PEAK |Z|", "EVENTS", "ACK")
_RIGHT = {"ID", "PEAK |Z|", "EVENTS"}


def rules_text(incident: Incident) -> str:
    return " + ".join(incident.rules)


def _ack_text(incident: Incident) -> str:
    n, acked = len(incident.events), incident.acknowledged_events
    if acked == n:
        return "yes"
    return "no" if acked == 0 else f"{acked} of {n}"


def incident_record(incident: Incident, with_events: bool = True) -> dict[str, Any]:
    """One incident as a JSON-ready dict (its events in full when ``with_events``)."""
    out: dict[str, Any] = {
        "id": incident.id,
        "feed_id": incident.feed_id,
        "incident_start": iso(incident.start),
        "end": iso(incident.end),
        "state": "active" if incident.end is None else "cleared",
        "rules": list(incident.rules),
        "severity": incident.severity,
        "peak_abs_z": _number(incident.peak_abs_z),
        "event_ids": [e.id for e in incident.events],
        "acknowledged_events": incident.acknowledged_events,
        "acknowledged": incident.acknowledged,
    }
    if with_events:
        out["events"] = [event_record(e) for e in incident.events]
    return out


def write_incidents_csv(incidents: Sequence[Incident], out: TextIO) -> int:
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    t = csv_text_cell
    for inc in incidents:
        r = incident_record(inc, with_events=False)
        writer.writerow([r["id"], t(r["feed_id"]), r["incident_start"], r["end"] or "", r["state"],
                         t(rules_text(inc)), r["severity"], "" if r["peak_abs_z"] is None else repr(r["peak_abs_z"]),
                         len(inc.events), " ".join(map(str, r["event_ids"])), r["acknowledged_events"],
                         "yes" if r["acknowledged"] else "no", CAUTION])
    print_caution(out, prefix="# ")
    return len(incidents)


def write_incidents_json(incidents: Sequence[Incident], out: TextIO, *, window: Mapping[str, Any],
                         filters: Mapping[str, Any]) -> int:
    document = {"window": dict(window), "filters": dict(filters), "count": len(incidents),
                "incidents": [incident_record(i) for i in incidents], "caution": CAUTION}
    json.dump(document, out, indent=2, ensure_ascii=False, allow_nan=False)
    out.write("\n")
    return len(incidents)


def incident_rows(incidents: Sequence[Incident], zone: tzinfo) -> list[list[str]]:
    return [[str(i.id), show_time(i.start, zone), "active" if i.end is None else show_time(i.end, zone),
             i.feed_id, rules_text(i), i.severity, show_abs_z(_number(i.peak_abs_z)), str(len(i.events)),
             _ack_text(i)] for i in incidents]


def write_incidents_table(incidents: Sequence[Incident], out: TextIO, zone: tzinfo, heading: str) -> int:
    print(safe_text(heading), file=out)
    if not incidents:
        print("No incidents.", file=out)
    else:
        write_aligned(TABLE_COLUMNS, incident_rows(incidents, zone), out, _RIGHT)
        events = sum(len(i.events) for i in incidents)
        active = sum(1 for i in incidents if i.end is None)
        unacked = sum(1 for i in incidents if not i.acknowledged)
        print(f"{len(incidents)} incident{'s' if len(incidents) != 1 else ''} of {events} "
              f"event{'s' if events != 1 else ''} ({active} active, {unacked} not fully acknowledged); "
              "--each-event lists every event.", file=out)
    print_caution(out)
    return len(incidents)
