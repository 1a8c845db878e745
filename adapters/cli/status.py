"""``leadline status``: per feed, its state, model, active alarms and shelving; rejected input per source.

Also the expected alarm load of the whole site: the false alarms per hour,
per shift and per week that the feeds' budgets (stored with each model's
limits) add up to, the ``[site]`` budget when the config has one, and each
feed's fit problems with their remedies (``FittedModel.advice``, stored in
the model record's ``fit_stats``).

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

from ..config.site import alarm_load

from . import review
from .formats import write_aligned
from .review import Review, add_store_options, iso, open_review, print_caution, show_age, show_time
from ..sinks.safe_text import safe_text

#: Shift length assumed for the alarm load per shift when the config names no shifts (common practice).
DEFAULT_SHIFT_HOURS = 8.0

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
    budgets: list[float] = []
    for feed in store.feeds():
        model = models.get(feed.feed_id)
        per_week = _budget_per_week(model)
        if per_week is not None:
            budgets.append(per_week)
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
                "false_alarms_per_week": per_week,
                "fit_problems": [dict(a) for a in model.fit_stats.get("advice", [])],
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
    return {"as_of": iso(now), "store": store.url, "feeds": feeds, "rejects": rejects,
            "alarm_load": _load(rv, budgets)}


def _budget_per_week(model: Any) -> float | None:
    """The false alarms per week a model's budget-mode limits were set for (None in sigma mode)."""
    budget = None if model is None else model.thresholds.get("budget")
    if not budget or not budget.get("per_s"):
        return None
    return float(budget["false_alarms"]) * 7 * 86400.0 / float(budget["per_s"])


def _shift_hours(rv: Review) -> tuple[float, str]:
    shifts = None if rv.config is None or rv.config.shifts is None else rv.config.shifts.shifts
    if not shifts:
        return DEFAULT_SHIFT_HOURS, "assumed (no shifts configured)"
    lengths = []
    for shift in shifts:
        start = shift.start.hour * 60 + shift.start.minute
        end = shift.end.hour * 60 + shift.end.minute
        lengths.append(((end - start) % (24 * 60) or 24 * 60) / 60.0)
    return sum(lengths) / len(lengths), "the configured shifts' mean length"


def _load(rv: Review, budgets: list[float]) -> dict[str, Any]:
    """The false alarms the feeds' budgets imply for the whole site, and the site budget of the config."""
    hours, source = _shift_hours(rv)
    out: dict[str, Any] = {"feeds_with_budget": len(budgets), **alarm_load(budgets, hours), "shift_hours_from": source}
    site = None if rv.config is None else rv.config.site
    out["site"] = None if site is None else {
        "false_alarms_per_operator_hour": site.false_alarms_per_operator_hour, "feeds": site.feeds,
        "feeds_from": site.feeds_from, "per_feed_per_week": site.per_feed_per_week}
    return out


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
    load = data["alarm_load"]
    if load["feeds_with_budget"]:
        print("", file=out)
        print(f"Expected false alarms from the budgets of {load['feeds_with_budget']} feeds: "
              f"{load['per_hour']:.3g} per hour, {load['per_shift']:.3g} per {load['shift_hours']:g}-hour shift "
              f"({load['shift_hours_from']}), {load['per_week']:.3g} per week; real faults come on top.", file=out)
    if load["site"] is not None:
        site = load["site"]
        print(f"Site budget: {site['false_alarms_per_operator_hour']:g} false alarms per operator hour shared "
              f"by {site['feeds']} feeds ({site['feeds_from']}): {site['per_feed_per_week']:.3g} per feed per "
              "week.", file=out)
    problems = [(f["feed_id"], p) for f in data["feeds"] if f["model"] for p in f["model"]["fit_problems"]]
    if problems:
        print("", file=out)
        print("Fit problems and their remedies:", file=out)
        for feed_id, p in problems:
            print(safe_text(f"  {feed_id}: {p.get('text', '')} Remedy: {p.get('remedy', '')}"), file=out)
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
