"""IncidentGrouper: one incident per abnormal condition on a feed."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest

from leadline.detector.errors import StateFormatError
from leadline.detector.events import AlarmEvent
from leadline.detector.incidents import IncidentGrouper

T0 = datetime(2026, 3, 14, 2, 0, tzinfo=timezone.utc)
FEED = "ashby-moor/dm-east/flow"


def at(minutes: float) -> datetime:
    return T0 + timedelta(minutes=minutes)


def ev(rule: str, start: float, end: float | None = None) -> AlarmEvent:
    return AlarmEvent(FEED, rule, "alarm", at(start), None if end is None else at(end))


def test_overlapping_rules_form_one_incident_and_keep_their_own_events():
    g = IncidentGrouper(gap_s=15 * 60)
    spike = g.tag(ev("spike", 0))
    cusum = g.tag(ev("cusum", 15))
    spike_end = g.tag(ev("spike", 0, 30))
    cusum_end = g.tag(ev("cusum", 15, 600))
    assert {e.incident_start for e in (spike, cusum, spike_end, cusum_end)} == {at(0)}
    assert (spike.rule, cusum.rule) == ("spike", "cusum")


def test_an_event_after_the_gap_starts_a_new_incident_and_one_inside_it_joins():
    g = IncidentGrouper(gap_s=15 * 60)
    g.tag(ev("noise_burst", 0))
    g.tag(ev("noise_burst", 0, 30))
    again = g.tag(ev("noise_burst", 40))  # 10 min after the clearing: same condition
    assert again.incident_start == at(0)
    g.tag(ev("noise_burst", 40, 50))
    later = g.tag(ev("spike", 120))  # 70 min after: a new incident
    assert later.incident_start == at(120)


def test_meter_reset_stands_alone():
    g = IncidentGrouper(gap_s=3600)
    g.tag(ev("cusum", 0))
    reset = g.tag(ev("meter_reset", 5, 5))
    assert reset.incident_start == at(5)
    assert g.tag(ev("spike", 6)).incident_start == at(0)


def test_event_opened_and_closed_at_once_is_grouped_like_any_other():
    g = IncidentGrouper(gap_s=0)
    stale = g.tag(ev("stale", 0, 90))
    assert stale.incident_start == at(0)
    assert g.open_events == 0
    assert g.tag(ev("spike", 91)).incident_start == at(91)


def test_state_round_trip():
    g = IncidentGrouper(gap_s=600)
    g.tag(ev("cusum", 0))
    g.tag(ev("spike", 1))
    h = IncidentGrouper(gap_s=600)
    h.load_state(g.state_dict())
    assert h.state_dict() == g.state_dict()
    assert h.tag(ev("cusum", 0, 60)).incident_start == at(0)
    with pytest.raises(StateFormatError):
        h.load_state({"v": 2})
