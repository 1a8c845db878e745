"""A small hand-built store of one night shift at the invented Tarnbeck water works.

Europe/London keeps GMT (UTC+0) until the last Sunday of March (EU Directive
2000/84/EC, Article 2), so on 2026-03-13/14 local time is UTC and the night
shift 18:00-06:00 runs from 2026-03-13T18:00Z to 2026-03-14T06:00Z.

In that shift (17 alarms in 12 hours):

- a flood: 12 spike alarms 45 s apart from 22:00Z, two on each of six flow feeds;
- a repeating alarm: three cusum episodes on ``tarnbeck/flow/dm-07``;
- an acknowledged cusum alarm on the reservoir level;
- a stale episode on a pump pressure feed, still active at the end.

Standing at the shift's end (started 24 h or more before it, not cleared by then):
a flatline on ``tarnbeck/flow/dm-09`` still active now, and a range alarm on the
same feed that cleared two hours after the shift ended. A third active event
started less than 24 h before the end, so it is not standing. ``dm-09`` is shelved.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest

from leadline.adapters.cli import review
from leadline.adapters.store.eventstore import open_store
from leadline.detector.events import AlarmEvent
from leadline.detector.evidence import record_from_arrays

UTC = timezone.utc
NOW = datetime(2026, 3, 14, 9, 30, tzinfo=UTC)
SHIFT_START = datetime(2026, 3, 13, 18, 0, tzinfo=UTC)
SHIFT_END = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)
FLOOD_AT = datetime(2026, 3, 13, 22, 0, tzinfo=UTC)

CONFIG = """
[store]
url = "events.db"

[shifts]
timezone = "Europe/London"
day = "06:00-18:00"
night = "18:00-06:00"
"""

FLOOD_FEEDS = [f"tarnbeck/flow/dm-0{i}" for i in range(1, 7)]
REPEAT_FEED = "tarnbeck/flow/dm-07"
LEVEL = "tarnbeck/reservoir/level"
PUMP = "tarnbeck/pumps/ps2/pressure"
STANDING_FEED = "tarnbeck/flow/dm-09"


def t(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)


def shift_events() -> dict[str, AlarmEvent]:
    events = {}
    for i in range(12):
        start = FLOOD_AT + timedelta(seconds=45 * i)
        events[f"flood_{i}"] = AlarmEvent(FLOOD_FEEDS[i % 6], "spike", "alarm", start, start + timedelta(minutes=5),
                                          peak_abs_z=6.0 + i / 10, value_at_onset=30.0 + i,
                                          forecast_at_onset=12.0, detail=f"flood spike {i}", model_version=1)
    for k, hour in enumerate(("01:00", "02:00", "03:00")):
        start = t(f"2026-03-14T{hour}")
        events[f"repeat_{k}"] = AlarmEvent(REPEAT_FEED, "cusum", "warning", start, start + timedelta(minutes=30),
                                           peak_abs_z=3.1, detail="night flow up", model_version=2)
    events["acked"] = AlarmEvent(LEVEL, "cusum", "alarm", t("2026-03-14T04:00"), t("2026-03-14T04:45"),
                                 peak_abs_z=4.2, detail="level falling faster than forecast", model_version=1)
    events["stale"] = AlarmEvent(PUMP, "stale", "warning", t("2026-03-14T05:00"), None,
                                 detail="no readings for 4 intervals")
    # before the shift
    events["standing_active"] = AlarmEvent(STANDING_FEED, "flatline", "alarm", t("2026-03-12T01:00"), None,
                                           detail="flow unchanged")
    events["standing_cleared_later"] = AlarmEvent(STANDING_FEED, "range", "alarm", t("2026-03-12T03:00"),
                                                  t("2026-03-14T08:00"), detail="below range")
    events["recent_active"] = AlarmEvent(LEVEL, "spike", "warning", t("2026-03-13T10:00"), None,
                                         detail="not standing: under 24 h at the shift's end")
    return events


def evidence_for(ev: AlarmEvent, n_before: int = 96, n_after: int = 24, seed: int = 1):
    """A plausible record: a seasonal night flow with a step at the onset."""
    rng = np.random.default_rng(seed)
    slots = int(((ev.end or SHIFT_END) - ev.start).total_seconds() // 900) + 1
    n = n_before + slots + n_after
    epoch = ev.start.timestamp() + 900.0 * (np.arange(n) - n_before)
    hours = (epoch % 86400) / 3600
    forecast = 20 + 8 * np.sin(2 * np.pi * (hours - 9) / 24)
    value = forecast + rng.normal(0, 0.8, n)
    value[n_before:n_before + slots] += 6.0
    value[10] = np.nan
    return record_from_arrays(ev.feed_id, ev.rule, ev.start, ev.end is not None, epoch, value, forecast,
                              forecast - 1.96, forecast + 1.96, end=ev.end)


@dataclass
class ShiftSite:
    config: Path
    db: Path
    ids: dict[str, int]
    events: dict[str, AlarmEvent]


def build_site(tmp_path: Path) -> ShiftSite:
    config = tmp_path / "leadline.toml"
    config.write_text(CONFIG)
    db = tmp_path / "events.db"
    events = shift_events()
    with open_store(str(db)) as store:
        store.ensure_feed(REPEAT_FEED, unit="L/s", interval_s=900.0, source="tarnbeck-broker")
        store.ensure_feed(LEVEL, unit="m", interval_s=900.0, source="tarnbeck-broker")
        for version, reason in ((1, "initial fit"), (2, "scheduled refit")):
            store.record_model(REPEAT_FEED, "ARMA(1,1) + const", {"ar.L1": 0.6}, {"mode": "budget"},
                               {"sigma2": 0.64, "ljung_box_pvalue": 0.31,
                                "calendar": {"periods": [[86400.0, 3]], "weekend": True, "holidays": []}},
                               fitted_at=NOW - timedelta(days=20 - version), window_start=NOW - timedelta(days=34),
                               window_end=NOW - timedelta(days=20 - version), reason=reason)
        for ev in events.values():
            store.stage_event(ev)
        for name in ("repeat_0", "repeat_1", "acked", "flood_0"):
            store.stage_evidence(evidence_for(events[name]))
        store.flush()
        ids = {name: next(s.id for s in store.events() if s.event.key == ev.key) for name, ev in events.items()}
        store.add_note(ids["acked"], "ack", "B. Operator", "valve checked, level recovering",
                       at=t("2026-03-14T04:20"))
        store.shelve(STANDING_FEED, "B. Operator", "meter replaced, awaiting commissioning",
                     until=t("2026-03-14T20:00"), at=t("2026-03-13T20:00"))
    return ShiftSite(config, db, ids, events)


@pytest.fixture
def shift_site(tmp_path, monkeypatch) -> ShiftSite:
    site = build_site(tmp_path)
    monkeypatch.setattr(review, "utc_now", lambda: NOW)
    return site
