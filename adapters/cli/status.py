"""``leadline status``: per feed, its state, model, active alarms and shelving; rejected input per source.

Read from the store only. The store does not yet hold a feed's lifecycle
state or its last reading, so:

* **state** is inferred: ``learning`` while a feed has no model record,
  ``watching`` once it has one (a refit in progress cannot be told apart);
  the JSON says so in ``state_from``;
* **last reading** is shown as unknown.

What the service must record for this command to show them exactly (one
row per feed, committed with each flush): the lifecycle state
(``learning``, ``fitting``, ``watching``, ``refit``), the time and value of
the last reading, readings seen, and while learning the points collected
and needed.
"""

from __future__ import annotations

import json
import sys
from collections import defaultdict
from datetime import datetime
from typing import Any, TextIO

from leadline.detector.events import CAUTION

from . import review
from .formats import write_aligned
from .review import Review, add_store_options, iso, open_review, print_caution, show_age, show_time
from ..sinks.safe_text import safe_text

FEED_COLUMNS = ("FEED", "SOURCE", "STATE", "LAST READING", "MODEL", "FITTED", "ACTIVE ALARMS", "SHELVED UNTIL")
REJECT_COLUMNS = ("SOURCE", "REASON", "COUNT", "FIRST SEEN", "LAST SEEN")


def collect(rv: Review, now: datetime) -> dict[str, Any]:
    """Everything the command shows, as plain data."""
    store = rv.store
    models = store.latest_models()
    checkpoints = store.load_checkpoints()
    active: dict[str, list] = defaultdict(list)
    for stored in store.standing_events(now, older_than_h=0.0):
        active[stored.event.feed_id].append(stored)
    shelved = {n.feed_id: n for n in store.shelved_feeds(now)}
    feeds = []
    for feed in store.feeds():
        model = models.get(feed.feed_id)
        feeds.append({
            "feed_id": feed.feed_id,
            "source": feed.source,
            "unit": feed.unit,
            "interval_s": feed.interval_s,
            "state": "watching" if model is not None else "learning",
            "state_from": "model records",
            "last_reading_at": None,  # not in the store yet (module docstring)
            "checkpoint": feed.feed_id in checkpoints,
            "model": None if model is None else {
                "version": model.version, "order": model.order, "fitted_at": iso(model.fitted_at),
                "age_s": (now - model.fitted_at).total_seconds(), "reason": model.reason,
                "window_start": iso(model.window_start), "window_end": iso(model.window_end),
            },
            "active_alarms": [
                {"id": s.id, "rule": s.event.rule, "severity": s.event.severity, "start": iso(s.event.start),
                 "acknowledged": s.acknowledged}
                for s in active.get(feed.feed_id, [])
            ],
            "shelved_until": iso(shelved[feed.feed_id].expires_at) if feed.feed_id in shelved else None,
            "shelved_by": shelved[feed.feed_id].operator if feed.feed_id in shelved else None,
        })
    rejects = [{"source": r.source, "reason": r.reason, "count": r.count, "first_seen": iso(r.first_seen),
                "last_seen": iso(r.last_seen)} for r in store.reject_counts()]
    return {"as_of": iso(now), "store": store.url, "feeds": feeds, "rejects": rejects}


def _alarms_text(alarms: list[dict[str, Any]]) -> str:
    if not alarms:
        return "-"
    parts = [f"{a['rule']} {a['severity']}" + ("" if a["acknowledged"] else " (unacked)") for a in alarms]
    return f"{len(alarms)}: " + ", ".join(parts)


def write_table(data: dict[str, Any], rv: Review, now: datetime, out: TextIO) -> None:
    print(safe_text(f"Status as of {show_time(now, rv.zone)}; store {data['store']}"), file=out)
    rows = []
    for f in data["feeds"]:
        model = f["model"]
        fitted = "-" if model is None else (
            f"{show_time(datetime.fromisoformat(model['fitted_at']), rv.zone)} ({show_age(model['age_s'])} ago)")
        shelved = "-" if f["shelved_until"] is None else (
            f"{show_time(datetime.fromisoformat(f['shelved_until']), rv.zone)} ({f['shelved_by']})")
        last = "-" if f["last_reading_at"] is None else show_time(datetime.fromisoformat(f["last_reading_at"]),
                                                                   rv.zone)
        rows.append([f["feed_id"], f["source"] or "-", f["state"], last,
                     "-" if model is None else f"v{model['version']} {model['order']}", fitted,
                     _alarms_text(f["active_alarms"]), shelved])
    if rows:
        write_aligned(FEED_COLUMNS, rows, out)
    else:
        print("No feeds in this store yet.", file=out)
    if data["feeds"]:
        print("STATE is inferred from the model records (no model yet: learning; a model: watching); "
              "LAST READING is not recorded in the store yet.", file=out)
    if data["rejects"]:
        print("", file=out)
        print("Rejected input:", file=out)
        write_aligned(REJECT_COLUMNS, [
            [r["source"], r["reason"], str(r["count"]), show_time(datetime.fromisoformat(r["first_seen"]), rv.zone),
             show_time(datetime.fromisoformat(r["last_seen"]), rv.zone)] for r in data["rejects"]
        ], out, right={"COUNT"})
    print_caution(out)


def run_status(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    now = review.utc_now()
    with open_review(args) as rv:
        data = collect(rv, now)
        if args.format == "json":
            json.dump({**data, "caution": CAUTION}, out, indent=2, ensure_ascii=False, allow_nan=False)
            out.write("\n")
        else:
            write_table(data, rv, now, out)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "status", help="show each feed's state, model, active alarms and rejected input",
        description="Per feed: its state, model version and age, active alarms and shelving; then the "
                    "rejected input per source and reason. Read from the event store.")
    add_store_options(p)
    p.add_argument("--format", choices=("table", "json"), default="table", help="table (default) or json")
    p.set_defaults(handler=run_status)
