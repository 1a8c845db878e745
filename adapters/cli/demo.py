"""``leadline demo``: the whole service on an invented water district, with no set-up.

It makes a working folder with the Fenwick Vale scenario
(:mod:`.demo_scenario`): 14 days of history for eight feeds, one CSV file
per day, and a config file. It then runs the real service (CSV followers,
the engine, SQLite) against the folder, appends two "live" days to new day
files at accelerated speed, and finishes by printing the events table,
what each event was (which planted fault it found, or that it was not
planted), and the next commands to try. Time follows the readings, not the
wall clock (a replay), so the demo runs the same on any day.
"""

from __future__ import annotations

import io
import os
import shutil
import sys
import threading
import time
from pathlib import Path
from typing import TextIO
from zoneinfo import ZoneInfo

from leadline.detector.errors import DataError
from leadline.detector.events import CAUTION

from .words import counter_words, plural
from . import demo_scenario as scenario_module
from ..config.file import load_config
from ..service.wiring import build_service, open_configured_store
from .formats import write_table
from ..service.log_setup import configure_logging

MARKER = ".leadline-demo"
LIVE_SECONDS = 12.0
CONFIG = """\
# leadline demo: the invented water district of Fenwick Vale.
# Made by `leadline demo`; every name and number here is invented.

[store]
url = "leadline.db"

[[sources.csv]]
name = "fenwick-telemetry"
path = "telemetry/fenwick-*.csv"
format = "long"
from_start = true

[feeds.defaults]
interval = "15min"
train_points = {train_points}
train_span = "14d"
threshold_mode = "budget"
model = {{ order = [1, 0, 0] }}

[[feeds.override]]
match = "fenwick/*/flow"
model = {{ order = [1, 0, 1] }}
seasonality = ["1d:3"]
weekend = true
range_low = 0.0

[[feeds.override]]
match = "fenwick/reservoir/level"
model = {{ order = [2, 0, 0] }}
seasonality = ["1d:2"]
range_low = 0.0
range_high = 6.0

[[feeds.override]]
match = "fenwick/bulk-west/volume"
model = {{ order = [1, 0, 1] }}
seasonality = ["1d:3"]
weekend = true
counter = true
register_size = 1_000_000

[refit]
every = "7d"
workers = {workers}

[shifts]
timezone = "Europe/London"
day = "06:00-18:00"
night = "18:00-06:00"
"""


def prepare_folder(folder: Path) -> None:
    """Create the folder, or clear a previous demo's files from it; refuse anything else."""
    if folder.exists() and any(folder.iterdir()):
        if not (folder / MARKER).exists():
            raise DataError(f"{folder}: the folder exists and is not a leadline demo folder; "
                            "choose another with --dir")
        for name in ("telemetry",):
            shutil.rmtree(folder / name, ignore_errors=True)
        for path in folder.glob("leadline.db*"):
            path.unlink()
    folder.mkdir(parents=True, exist_ok=True)
    (folder / MARKER).write_text("made by leadline demo\n")
    (folder / "telemetry").mkdir(exist_ok=True)


def day_file(folder: Path, scenario, day: int) -> Path:
    stamp = scenario.slot_time(day * scenario_module.SLOTS_PER_DAY).date().isoformat()
    return folder / "telemetry" / f"fenwick-{stamp}.csv"


def write_history(folder: Path, scenario) -> int:
    rows = 0
    for day in range(scenario_module.HISTORY_DAYS):
        lines = scenario_module.rows_for_day(scenario, day)
        day_file(folder, scenario, day).write_text("timestamp,feed,value\n" + "\n".join(lines) + "\n")
        rows += len(lines)
    return rows


def append_live(folder: Path, scenario, seconds: float, progress) -> int:
    """Append the live days slot by slot, like a head-end exporting every 15 minutes."""
    rows = 0
    slots = scenario_module.LIVE_DAYS * scenario_module.SLOTS_PER_DAY
    pause = seconds / slots
    for i in range(slots):
        slot = scenario_module.HISTORY_DAYS * scenario_module.SLOTS_PER_DAY + i
        day = slot // scenario_module.SLOTS_PER_DAY
        path = day_file(folder, scenario, day)
        new = not path.exists()
        lines = scenario_module.rows_for_slot(scenario, slot)
        with path.open("a", encoding="utf-8") as handle:
            if new:
                handle.write("timestamp,feed,value\n")
            handle.write("\n".join(lines) + "\n")
        rows += len(lines)
        if i % (slots // 8) == 0 or i == slots - 1:
            progress(f"live readings up to {scenario.slot_time(slot):%Y-%m-%d %H:%M} UTC")
        time.sleep(pause)
    return rows


def match_fault(stored, scenario) -> int | None:
    """Index of the planted fault an event found (same feed, during it or within 24
    readings after), or None when the event was not planted."""
    event = stored.event
    for index, fault in enumerate(scenario.faults):
        if fault.feed_id != event.feed_id or fault.rule is None:
            continue
        if scenario.slot_time(fault.start_slot) <= event.start <= scenario.slot_time(fault.end_slot + 24):
            return index
    return None


def run_demo(folder: Path, out: TextIO = sys.stdout, live_seconds: float = LIVE_SECONDS) -> dict:
    """Run the demo in ``folder``; return what was found (for the tests)."""
    started = time.monotonic()

    def progress(text: str) -> None:
        print(f"[{time.monotonic() - started:5.1f} s] {text}", file=out, flush=True)

    progress("building the invented Fenwick Vale scenario")
    scenario = scenario_module.build_scenario()
    prepare_folder(folder)
    history_rows = write_history(folder, scenario)
    workers = max(1, min(2, os.cpu_count() or 1))
    train_points = scenario_module.HISTORY_DAYS * scenario_module.SLOTS_PER_DAY
    (folder / "leadline.toml").write_text(CONFIG.format(train_points=train_points, workers=workers))
    progress(f"wrote {history_rows} readings of history for {len(scenario.feeds)} feeds of the invented "
             f"Fenwick Vale water district to {folder / 'telemetry'}")
    config = load_config(folder / "leadline.toml")
    store = open_configured_store(config)
    service = build_service(config, replay=True, store=store)
    service.summary_interval_s = 5.0
    failure: list[BaseException] = []

    def serve() -> None:
        try:
            service.run()
        except BaseException as exc:  # noqa: BLE001 - reported by the main thread
            failure.append(exc)

    thread = threading.Thread(target=serve, name="leadline-demo-service", daemon=True)
    thread.start()
    progress("service started: following the CSV files, learning each feed, fitting in the background")
    live_rows = append_live(folder, scenario, live_seconds, progress)
    expected = history_rows + live_rows
    deadline = time.monotonic() + 120.0
    last_line = time.monotonic()
    while time.monotonic() < deadline and not failure:
        status = service.engine.status()
        states = {s["state"] for s in status}
        if service.readings_total >= expected and not service.refits_running and states == {"watching"}:
            break
        if time.monotonic() - last_line >= 1.0:  # never silent for long
            watching = sum(s["state"] == "watching" for s in status)
            progress(f"{service.readings_total:,} of {expected:,} readings read; {watching} of {len(status)} feeds "
                     f"watching, {plural(service.refits_running, 'fit')} running")
            last_line = time.monotonic()
        time.sleep(0.2)
    service.request_stop()
    thread.join(timeout=60.0)
    if failure:
        raise failure[0]
    events = store.events()
    progress(f"done: {service.readings_total} readings, {len(events)} events")
    zone = ZoneInfo("Europe/London")
    buffer = io.StringIO()
    write_table(events, buffer, zone, "Events (times in Europe/London)", caution=False)  # printed once, at the end
    print(buffer.getvalue().rstrip("\n"), file=out)
    print("\nWhat each event was:", file=out)
    by_fault: dict[int, list] = {}
    not_planted = []
    for stored in events:
        index = match_fault(stored, scenario)
        if index is None:
            not_planted.append(stored)
        else:
            by_fault.setdefault(index, []).append(stored)
    for index, fault in enumerate(scenario.faults):
        if fault.rule is None:
            continue
        hits = by_fault.get(index, [])
        if not hits:
            print(f"  {fault.feed_id}: planted {fault.kind} NOT FOUND ({fault.description})", file=out)
            continue
        first = min(hits, key=lambda e: e.event.start)
        delay = int((first.event.start - scenario.slot_time(fault.start_slot)).total_seconds() // 900)
        ids = ", ".join(f"#{e.id} {e.event.rule}" for e in hits)
        print(f"  {fault.feed_id}: planted {fault.kind} ({fault.description}); first found {delay} readings "
              f"after it began, by {ids}", file=out)
    if not_planted:
        ids = ", ".join(f"#{e.id} {e.event.feed_id} {e.event.rule}" for e in not_planted)
        print(f"  not planted (false alarms or ordinary variation, for the operator to judge): {ids}", file=out)
    wanted = {i for i, f in enumerate(scenario.faults) if f.rule is not None}
    found = set(by_fault)
    status = {s["feed_id"]: s for s in service.engine.status()}
    counts = status["fenwick/bulk-west/volume"].get("counter", {})
    print(f"\nPlanted faults found: {len(found & wanted)} of {len(wanted)}. The register rollover of "
          f"fenwick/bulk-west/volume was handled as a rollover, not as an alarm: {counter_words(counts)}.", file=out)
    config_path = folder / "leadline.toml"
    first = events[0].id if events else 1
    print(f"""
Next, try:
  leadline events --config {config_path} --since 2026-10-19 --until 2026-10-21
  leadline events --config {config_path} --shift 2026-10-20/night --format json
  leadline ack {first} --config {config_path} --by "A. Operator" --note "checked on site"
  leadline status --config {config_path}
  leadline summary --config {config_path} --shift 2026-10-20/night
  leadline report --config {config_path} --since 2026-10-19 --until 2026-10-21 --out {folder / 'report.html'}

{CAUTION}""", file=out)
    store.close()
    return {"found": found, "wanted": wanted, "by_fault": by_fault, "scenario": scenario, "events": events,
            "not_planted": not_planted, "readings": service.readings_total,
            "expected": expected, "seconds": time.monotonic() - started}


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("demo", help="run the service on an invented water district, no set-up needed",
                              description="Make a folder with an invented scenario (history, live readings, a "
                                          "config), run the real service against it and show what it found.")
    p.add_argument("--dir", default="leadline-demo", help="working folder (default ./leadline-demo)")
    p.add_argument("--live-seconds", type=float, default=LIVE_SECONDS,
                   help=f"how long the two live days take to arrive (default {LIVE_SECONDS:g} s)")
    p.set_defaults(handler=_handle)


def _handle(args) -> int:
    configure_logging("warning", "text", sys.stderr)  # escaped messages (log_setup)
    result = run_demo(Path(args.dir).resolve(), live_seconds=args.live_seconds)
    return 0 if result["found"] >= result["wanted"] else 1
