"""``leadline events``: the events of a time window or shift, filtered, as a table, CSV or JSON."""

from __future__ import annotations

import sys
from typing import Any, TextIO

from leadline.detector.errors import DataError
from leadline.detector.events import SEVERITIES
from leadline.detector.rules.registry import event_rule_names

from . import review
from ..config.values import did_you_mean
from .words import plural
from .formats import write_csv, write_json, write_table
from .shelving import add_include_option, split_shelved
from .incident_formats import write_incidents_csv, write_incidents_json, write_incidents_table
from ..store.queries import group_incidents
from .review import Review, Window, add_store_options, add_window_options, iso, open_review, resolve_window

#: The rule names the engine emits (AlarmEvent.rule: the rule registry and the engine's own kinds), for hints.
KNOWN_RULES = event_rule_names()
DEFAULT_SINCE = "24h"
FORMATS = ("table", "csv", "json")


def add_filter_options(parser) -> None:
    parser.add_argument("--feed", metavar="GLOB", help="feeds whose id matches this glob, e.g. 'marrowby/flow/*'")
    parser.add_argument("--rule", help=f"one rule: {', '.join(KNOWN_RULES)}")
    parser.add_argument("--severity", choices=SEVERITIES, help="one severity")
    parser.add_argument("--unacked", action="store_true", help="only events nobody has acknowledged")
    add_include_option(parser)


def filters_of(args) -> dict[str, Any]:
    return {"feed": args.feed, "rule": args.rule, "severity": args.severity, "unacked": bool(args.unacked),
            "include_shelved": bool(getattr(args, "include_shelved", False))}


def window_record(window: Window, rv: Review) -> dict[str, Any]:
    return {"since": iso(window.since), "until": iso(window.until),
            "shift": window.shift.label if window.shift else None, "timezone": rv.zone_name}


#: Export keeps every record, the events of shelved feeds included.
NO_FILTERS: dict[str, Any] = {"feed": None, "rule": None, "severity": None, "unacked": False,
                              "include_shelved": True}


def fetch(rv: Review, window: Window, filters: dict[str, Any], limit: int | None = None) -> list:
    """The window's events; those of shelved feeds left out unless ``filters["include_shelved"]``."""
    events = rv.store.events(since=window.since, until=window.until, feed_pattern=filters["feed"],
                             rule=filters["rule"], severity=filters["severity"],
                             unacked=True if filters["unacked"] else None,
                             limit=limit if filters.get("include_shelved", True) else None)
    if not filters.get("include_shelved", True):
        events, _ = split_shelved(events, rv.store.shelving_notes())
        events = events[:limit] if limit is not None else events
    return events


def hidden_shelved(rv: Review, window: Window, filters: dict[str, Any]) -> int:
    """How many events of the window were left out as events of shelved feeds."""
    if filters.get("include_shelved", True):
        return 0
    every = rv.store.events(since=window.since, until=window.until, feed_pattern=filters["feed"],
                            rule=filters["rule"], severity=filters["severity"],
                            unacked=True if filters["unacked"] else None)
    return split_shelved(every, rv.store.shelving_notes())[1]


def heading(window: Window, rv: Review, filters: dict[str, Any]) -> str:
    parts = [window.describe(rv.zone)]
    shown = {k: v for k, v in filters.items() if v and k != "include_shelved"}
    if shown:
        parts.append("filters: " + ", ".join(f"{k} {v}" if v is not True else k for k, v in shown.items()))
    parts.append(f"times in {rv.zone_name}; store {rv.store.url}")
    return "; ".join(parts)


def write_listing(events: list, fmt: str, out: TextIO, rv: Review, window: Window, filters: dict[str, Any]) -> int:
    if fmt == "csv":
        return write_csv(events, out)
    if fmt == "json":
        return write_json(events, out, window=window_record(window, rv), filters=filters)
    return write_table(events, out, rv.zone, heading(window, rv, filters))


def write_incident_listing(events: list, fmt: str, out: TextIO, rv: Review, window: Window,
                           filters: dict[str, Any]) -> int:
    """The events grouped by incident, one line (record) per incident."""
    incidents = group_incidents(events)
    if fmt == "csv":
        return write_incidents_csv(incidents, out)
    if fmt == "json":
        return write_incidents_json(incidents, out, window=window_record(window, rv), filters=filters)
    return write_incidents_table(incidents, out, rv.zone, heading(window, rv, filters))


def run_events(args, out: TextIO | None = None, err: TextIO | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr
    if args.limit is not None and args.limit < 1:
        raise DataError(f"--limit must be at least 1, got {args.limit}")
    now = review.utc_now()
    with open_review(args) as rv:
        window = resolve_window(args, rv, now, DEFAULT_SINCE)
        filters = filters_of(args)
        events = fetch(rv, window, filters, args.limit)
        hidden = hidden_shelved(rv, window, filters)
        if hidden and args.format == "table":
            print(f"{plural(hidden, 'event')} of shelved feeds not listed (--include-shelved lists them).", file=out)
        if args.each_event:
            write_listing(events, args.format, out, rv, window, filters)
        else:
            write_incident_listing(events, args.format, out, rv, window, filters)
    if not events and args.rule and args.rule not in KNOWN_RULES:
        hint = did_you_mean(args.rule, KNOWN_RULES)
        print(f"leadline events: no rule named {args.rule!r} is known to this build" + (f"; {hint}" if hint else "")
              + f" (known: {', '.join(KNOWN_RULES)})", file=err)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "events", help="list alarm events of a time window or shift",
        description="List the incidents whose events started in a time window (default: the last 24 hours) "
                    "or in one operator shift, oldest first: one line per incident (the events of one feed "
                    "that overlap or follow each other closely), with its rules and who acknowledged them; "
                    "--each-event lists every event. Alarms are advisory.")
    add_store_options(p)
    add_window_options(p, DEFAULT_SINCE)
    add_filter_options(p)
    p.add_argument("--limit", type=int, metavar="N", help="at most N events (the oldest)")
    p.add_argument("--each-event", action="store_true",
                   help="one line per event instead of one per incident")
    p.add_argument("--format", choices=FORMATS, default="table", help="table (default), csv or json")
    p.set_defaults(handler=run_events)
