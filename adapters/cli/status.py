"""``leadline status``: the health view, one line per feed, stale feeds first.

Per feed: its last reading with that reading's age, its source, its state
(with learning progress, ``learning 312 of 672``), its model in words (the
fit's description), fit problems with advice, active alarms, and whether
it is shelved and until when. Above the table: whether the service is
running (its heartbeat is younger than a few beat intervals) and since when.

Also the expected alarm load of the whole site: the false alarms per hour,
per shift and per week that the feeds' budgets (stored with each model's
limits) add up to, and the ``[site]`` budget when the config has one.

The state, last reading, source and learning progress come from the
``feed_status`` table the running service writes with each flush; a feed
the service has not reported on yet falls back to the model records
(``learning`` without a model, ``watching`` with one; ``state_from`` says
which). While no service is running, no feed is shown as ``watching``: its
state reads ``stopped (was watching)``.

A feed is *stale* when its last reading is older than 3 nominal intervals
(common practice for a missed-reading check), or it has an active ``stale``
alarm.
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
from .words import show_value

#: Shift length assumed for the alarm load per shift when the config names no shifts (common practice).
DEFAULT_SHIFT_HOURS = 8.0

FEED_COLUMNS = ("FEED", "LAST READING", "AGE", "SOURCE", "STATE", "MODEL", "FIT PROBLEMS", "ACTIVE ALARMS",
                "SHELVED UNTIL")
REJECT_COLUMNS = ("SOURCE", "REASON", "COUNT", "FIRST SEEN", "LAST SEEN")

#: A feed is stale when its last reading is older than this many nominal intervals (common practice).
STALE_INTERVALS = 3.0


def _service(store, now: datetime) -> dict[str, Any]:
    beats = store.heartbeats()
    if not beats:
        return {"alive": False, "seen": False}
    beat = beats[0]
    return {"alive": beat.alive(now), "seen": True, "name": beat.service, "started_at": iso(beat.started_at),
            "last_beat_at": iso(beat.beat_at), "last_beat_age_s": (now - beat.beat_at).total_seconds(),
            "pid": beat.pid, "version": beat.version, "beat_interval_s": beat.beat_interval_s}


def _model(model, now: datetime) -> dict[str, Any] | None:
    if model is None:
        return None
    stats = model.fit_stats or {}
    advice = [f"{a.get('text', '')} (advice: {a.get('remedy', '')})"
              for a in stats.get("advice", []) if isinstance(a, dict)]
    return {"version": model.version, "order": model.order, "description": stats.get("description") or model.order,
            "fitted_at": iso(model.fitted_at), "age_s": (now - model.fitted_at).total_seconds(),
            "reason": model.reason, "problems": list(stats.get("problems", [])), "advice": advice,
            "window_start": iso(model.window_start), "window_end": iso(model.window_end)}


def collect(rv: Review, now: datetime) -> dict[str, Any]:
    """Everything the command shows, as plain data."""
    store = rv.store
    service = _service(store, now)
    models = store.latest_models()
    checkpoints = store.load_checkpoints()
    status = store.feed_status()
    active: dict[str, list] = defaultdict(list)
    for stored in store.standing_events(now, older_than_h=0.0):
        active[stored.event.feed_id].append(stored)
    shelved = {n.feed_id: n for n in store.shelved_feeds(now)}
    feeds = []
    budgets: list[float] = []
    for feed in store.feeds():
        model = models.get(feed.feed_id)
        row = status.get(feed.feed_id)
        state = row.state if row is not None else ("watching" if model is not None else "learning")
        shown = state if service["alive"] or state != "watching" else "stopped (was watching)"
        interval_s = (row.interval_s if row is not None and row.interval_s else None) or feed.interval_s
        last_at = row.last_reading_at if row is not None else None
        age_s = None if last_at is None else (now - last_at).total_seconds()
        alarms = active.get(feed.feed_id, [])
        stale = any(s.event.rule == "stale" for s in alarms) or (
            age_s is not None and interval_s is not None and age_s > STALE_INTERVALS * interval_s)
        learning = None
        if row is not None and row.state == "learning" and row.learning_need:
            learning = {"readings": row.learning_have or 0, "needed": row.learning_need}
        per_week = _budget_per_week(model)
        if per_week is not None:
            budgets.append(per_week)
        feeds.append({
            "feed_id": feed.feed_id,
            "source": (row.source if row is not None and row.source else None) or feed.source,
            "unit": (row.unit if row is not None and row.unit else None) or feed.unit,
            "interval_s": interval_s,
            "state": state,
            "state_shown": shown,
            "state_from": "service" if row is not None else "model records",
            "learning": learning,
            "last_reading_at": iso(last_at) if last_at is not None else None,
            "last_value": None if row is None else row.last_value,
            "last_reading_age_s": age_s,
            "stale": stale,
            "checkpoint": feed.feed_id in checkpoints,
            "model": _model(model, now),
            "active_alarms": [
                {"id": s.id, "rule": s.event.rule, "severity": s.event.severity, "start": iso(s.event.start),
                 "acknowledged": s.acknowledged}
                for s in alarms
            ],
            "shelved_until": iso(shelved[feed.feed_id].expires_at) if feed.feed_id in shelved else None,
            "shelved_by": shelved[feed.feed_id].operator if feed.feed_id in shelved else None,
        })
    feeds.sort(key=lambda f: (not f["stale"], f["feed_id"]))
    rejects = [{"source": r.source, "reason": r.reason, "count": r.count, "first_seen": iso(r.first_seen),
                "last_seen": iso(r.last_seen)} for r in store.reject_counts()]
    return {"as_of": iso(now), "store": store.url, "service": service, "feeds": feeds, "rejects": rejects,
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


def _service_line(service: dict[str, Any], zone) -> str:
    if not service["seen"]:
        return "Service: no running service has written to this store; feeds are not being watched."
    started = show_time(datetime.fromisoformat(service["started_at"]), zone)
    beat = show_age(service["last_beat_age_s"])
    if service["alive"]:
        return (f"Service: running since {started} (pid {service['pid']}, leadline {service['version']}; "
                f"last beat {beat} ago).")
    return (f"Service: NOT RUNNING - last beat {beat} ago (it had run since {started}); "
            "no feed is being watched.")


def _state_text(f: dict[str, Any]) -> str:
    if f["learning"] is not None:
        return f"learning {f['learning']['readings']:,} of {f['learning']['needed']:,}"
    return f["state_shown"]


def _model_text(model: dict[str, Any] | None) -> str:
    if model is None:
        return "-"
    return f"v{model['version']}: {model['description']}"


def _problems_text(model: dict[str, Any] | None) -> str:
    if model is None:
        return "-"
    return "; ".join(model["advice"] or model["problems"]) or "none"


def write_table(data: dict[str, Any], rv: Review, now: datetime, out: TextIO) -> None:
    print(safe_text(f"Status as of {show_time(now, rv.zone)}; store {data['store']}"), file=out)
    print(safe_text(_service_line(data["service"], rv.zone)), file=out)
    rows = []
    for f in data["feeds"]:
        shelved = "-" if f["shelved_until"] is None else (
            f"{show_time(datetime.fromisoformat(f['shelved_until']), rv.zone)} ({f['shelved_by']})")
        if f["last_reading_at"] is None:
            last, age = "-", "-"
        else:
            unit = f" {f['unit']}" if f["unit"] else ""
            last = f"{show_value(f['last_value'])}{unit} at {show_time(datetime.fromisoformat(f['last_reading_at']), rv.zone)}"
            age = show_age(f["last_reading_age_s"]) + (" STALE" if f["stale"] else "")
        if f["stale"] and f["last_reading_at"] is None:
            age = "STALE"
        rows.append([f["feed_id"], last, age, f["source"] or "-", _state_text(f), _model_text(f["model"]),
                     _problems_text(f["model"]), _alarms_text(f["active_alarms"]), shelved])
    if rows:
        write_aligned(FEED_COLUMNS, rows, out)
    else:
        print("No feeds in this store yet.", file=out)
    if any(f["state_from"] == "model records" for f in data["feeds"]):
        print("Feeds the service has not reported on yet: STATE is inferred from the model records.", file=out)
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
        "status", help="the health view: each feed's last reading, state, model, problems and shelving",
        description="Whether the service is running, then per feed (stale feeds first): its last reading "
                    "and its age, source, state and learning progress, model in words, fit problems with "
                    "advice, active alarms and shelving; then the rejected input per source and reason.")
    add_store_options(p)
    p.add_argument("--format", choices=("table", "json"), default="table", help="table (default) or json")
    p.set_defaults(handler=run_status)
