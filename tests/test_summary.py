"""Shift figures and ``leadline summary`` on a small hand-built store.

The flood rule (more than 10 alarms in 10 minutes) and the reference rates are common practice in
alarm management (as ISA-18.2 and EEMUA 191 present them; the numbers are from memory).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest

from leadline.adapters.cli import main
from leadline.adapters.report.figures import compute_figures, group_incidents, human_duration, plural
from leadline.adapters.store.records import StoredEvent
from leadline.detector.events import AlarmEvent

from shift_site import (FLOOD_AT, FLOOD_FEEDS, PUMP, REPEAT_FEED, SHIFT_END, SHIFT_START, STANDING_FEED,  # noqa: F401
                        shift_site)

UTC = timezone.utc
T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC)


def stored(i: int, start: datetime, feed: str = "tarnbeck/flow/dm-01", rule: str = "spike",
           end: datetime | None = None) -> StoredEvent:
    ev = AlarmEvent(feed, rule, "alarm", start, end)
    return StoredEvent(id=i, event=ev, created_at=start, updated_at=start)


def burst(n: int, spacing_s: float) -> list[StoredEvent]:
    return [stored(i, T0 + timedelta(hours=1, seconds=spacing_s * i), feed=f"f{i}") for i in range(n)]


@pytest.mark.parametrize("n, flood", [(10, False), (11, True), (12, True)])
def test_more_than_10_alarms_in_10_minutes_is_a_flood(n, flood):
    fig = compute_figures(burst(n, 50.0), T0, T0 + timedelta(hours=12))
    assert fig.peak_10min == n
    assert bool(fig.floods) is flood
    if flood:
        (f,) = fig.floods
        assert f.alarms == n and f.start == T0 + timedelta(hours=1)


def test_the_same_alarms_spread_over_an_hour_are_no_flood():
    fig = compute_figures(burst(12, 300.0), T0, T0 + timedelta(hours=12))
    assert fig.peak_10min == 2 and not fig.floods
    assert fig.per_hour == pytest.approx(1.0)
    assert sum(c for _, c in fig.rate_bins) == 12 and len(fig.rate_bins) == 72


def test_incidents_join_overlapping_episodes_of_one_feed():
    a = stored(1, T0, rule="spike", end=T0 + timedelta(minutes=30))
    b = stored(2, T0 + timedelta(minutes=15), rule="cusum", end=T0 + timedelta(hours=2))
    c = stored(3, T0 + timedelta(hours=3), rule="spike", end=T0 + timedelta(hours=3, minutes=15))
    d = stored(4, T0 + timedelta(minutes=20), feed="other", rule="spike")
    incidents = group_incidents([a, b, c, d], T0 + timedelta(hours=12))
    assert [[s.id for s in i.events] for i in incidents] == [[1, 2], [4], [3]]
    assert incidents[0].rules == ["cusum", "spike"] and incidents[0].end == T0 + timedelta(hours=2)
    assert incidents[1].end is None


def test_plurals_and_durations():
    assert plural(1, "alarm") == "1 alarm"
    assert plural(2, "alarm") == "2 alarms"
    assert plural(0, "feed") == "0 feeds"
    assert plural(1234, "episode") == "1,234 episodes"
    assert human_duration(3 * 86400 + 17 * 60 + 59) == "3 d 0 h 17 min"
    assert human_duration(2 * 3600 + 5 * 60) == "2 h 5 min"
    assert human_duration(17 * 60) == "17 min"
    assert human_duration(45) == "45 s"


def test_the_figures_of_the_hand_built_shift(shift_site):
    from leadline.adapters.report.figures import load_figures
    from leadline.adapters.store.eventstore import open_store

    with open_store(str(shift_site.db)) as store:
        data = load_figures(store, SHIFT_START, SHIFT_END)
    fig = data.figures
    assert fig.alarms == 17 and fig.hours == 12.0
    assert fig.per_hour == pytest.approx(17 / 12)
    (flood,) = fig.floods
    # 12 alarms 45 s apart: every 10 minutes from the first or second start holds more than 10
    assert flood.alarms == 12 and flood.start == FLOOD_AT
    assert flood.end == FLOOD_AT + timedelta(seconds=45, minutes=10)
    assert fig.peak_10min == 12
    assert [(r.feed_id, r.rule, r.episodes) for r in fig.repeating] == [(REPEAT_FEED, "cusum", 3)]
    assert fig.top_feeds[0].feed_id == REPEAT_FEED and fig.top_feeds[0].share == pytest.approx(3 / 17)
    assert len(fig.top_feeds) == 9 and fig.top10_share == 1.0
    assert sorted(s.event.rule for s in fig.standing) == ["flatline", "range"]
    assert len(fig.unacked) == 16
    assert [n.feed_id for n in fig.shelved] == [STANDING_FEED]
    assert fig.stale_feeds == (PUMP,)
    # the two spikes of each flood feed overlap (4.5 min apart, 5 min long): 6 + 3 + 1 + 1 incidents
    assert len(data.incidents) == 11
    assert [len(i.events) for i in data.incidents[:6]] == [2] * 6
    assert data.units[REPEAT_FEED] == "L/s"


def test_summary_command_prints_the_figures_with_plurals(shift_site, capsys):
    assert main(["summary", "--shift", "last", "--config", str(shift_site.config)]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].startswith("Summary of the night shift of 2026-03-13 (Europe/London)")
    assert "(12 h 0 min)" in lines[0]
    assert "THIS SHIFT" in out
    assert "17 alarms started (severity: 13 alarm, 4 warning)" in out
    row = next(line for line in lines if line.startswith("Most alarms in any 10 minutes"))
    assert row.split()[6] == "12" and row.endswith("ABOVE")
    assert "2026-03-13 22:00 GMT to 2026-03-13 22:10 GMT: 12 alarms in 10 min" in out
    assert f"{REPEAT_FEED} cusum: 3 episodes" in out
    assert "Standing alarms (2):" in out
    assert "(2 d 5 h 0 min at the end of the window)" in out  # 2026-03-12T01:00 to 2026-03-14T06:00
    assert "Unacknowledged alarms (16):" in out
    assert f"Stale feeds (1):\n  {PUMP}" in out
    assert "1 alarms" not in out and "1 feeds" not in out
    assert "operator judgment" in lines[-1]


def test_summary_over_since_and_until(shift_site, capsys):
    assert main(["summary", "--since", "2026-03-14T01:00Z", "--until", "2026-03-14T03:30Z",
                 "--config", str(shift_site.config)]) == 0
    out = capsys.readouterr().out
    assert "3 alarms started (severity: 3 warning)" in out
    assert "THIS WINDOW" in out and "THIS SHIFT" not in out
    assert "(2 h 30 min)" in out.splitlines()[0]
    assert "Floods:" not in out


def test_incidents_the_engine_grouped_are_kept_as_grouped():
    from dataclasses import replace

    # two episodes 40 minutes apart that the engine put in one incident (within its gap), and a
    # third that overlaps the second but which the engine began a new incident with
    a = stored(1, T0, rule="noise_burst", end=T0 + timedelta(minutes=20))
    b = stored(2, T0 + timedelta(hours=1), rule="noise_burst", end=T0 + timedelta(hours=2))
    c = stored(3, T0 + timedelta(hours=1, minutes=30), rule="spike", end=T0 + timedelta(hours=1, minutes=40))
    tagged = [replace(s, event=replace(s.event, incident_start=start))
              for s, start in ((a, T0), (b, T0), (c, T0 + timedelta(hours=1, minutes=30)))]
    incidents = group_incidents(tagged, T0 + timedelta(hours=12))
    assert [[s.id for s in i.events] for i in incidents] == [[1, 2], [3]]
