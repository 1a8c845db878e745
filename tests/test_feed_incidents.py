"""Incidents on the engine's events: every event a feed emits carries the start of its incident.

References: the grouping itself is checked in tests/test_incidents.py; here
the engine must tag the same incidents whether it runs uninterrupted or is
restored from a checkpoint (exact equality), and a checkpoint taken before
incidents were kept must still restore.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.detector.engine import Engine, EngineOutput
from leadline.detector.errors import ConfigError
from leadline.detector.feed_state import pack, unpack
from leadline.detector.readings import Reading
from leadline.detector.refit import run_refit
from engine_helpers import ar1, settings

T0 = datetime(2024, 5, 6, tzinfo=timezone.utc)
INTERVAL_S = 60.0
FEED = "tarnbeck/reservoir/level-1"


def at(i: float) -> datetime:
    return T0 + timedelta(seconds=INTERVAL_S * i)


def drive(engine: Engine, values, start: int = 0) -> EngineOutput:
    out = EngineOutput()
    for i, v in enumerate(values):
        step = engine.process(Reading(FEED, at(start + i), float(v)))
        out.extend(step)
        for request in step.refit_requests:
            out.extend(engine.install_model(FEED, run_refit(request), 1, request.reason))
    return out


@pytest.fixture(scope="module")
def faulty_feed():
    y = ar1(1100, seed=5)
    y[600] += 10.0  # a spike
    y[900:] += 3.0  # and, 300 slots later, a level shift
    return y


def incidents(out: EngineOutput):
    return [(ev.rule, ev.start, ev.end, ev.incident_start) for ev in out.events]


def test_every_event_carries_its_incident_and_distant_faults_are_separate_incidents(faulty_feed):
    out = drive(Engine(lambda feed_id: settings()), faulty_feed)
    assert out.events and all(ev.incident_start is not None for ev in out.events)
    starts = {ev.rule: ev.incident_start for ev in out.events}
    assert starts["spike"] == at(600)
    assert starts["cusum"] > at(900) - timedelta(seconds=1)  # 300 slots apart: more than the 12-slot gap
    assert starts["cusum"] != starts["spike"]


def test_a_gap_wide_enough_joins_the_two_faults_in_one_incident(faulty_feed):
    out = drive(Engine(lambda feed_id: settings(incident_gap_slots=400)), faulty_feed)
    assert {ev.incident_start for ev in out.events} == {at(600)}


def test_incident_gap_slots_is_checked():
    with pytest.raises(ConfigError, match="incident_gap_slots"):
        settings(incident_gap_slots=-1)
    with pytest.raises(ConfigError, match="incident_gap_slots"):
        settings(incident_gap_slots=2.5)


@pytest.mark.parametrize("cut", [601, 903])
def test_a_restored_feed_tags_the_same_incidents(faulty_feed, cut):
    s = settings(incident_gap_slots=400)
    whole = drive(Engine(lambda feed_id: s), faulty_feed)
    first = Engine(lambda feed_id: s)
    before = drive(first, faulty_feed[:cut])
    second = Engine(lambda feed_id: s)
    second.restore(FEED, first.checkpoint(FEED), 1)
    after = drive(second, faulty_feed[cut:], start=cut)
    assert incidents(before) + incidents(after) == incidents(whole)


def test_a_checkpoint_without_incidents_still_restores(faulty_feed):
    s = settings(incident_gap_slots=400)
    first = Engine(lambda feed_id: s)
    drive(first, faulty_feed[:700])
    header, arrays = unpack(first.checkpoint(FEED))
    del header["incidents"]  # the layout before incidents were kept
    second = Engine(lambda feed_id: s)
    second.restore(FEED, pack(header, arrays), 1)
    after = drive(second, faulty_feed[700:], start=700)
    # nothing open and no clearing remembered: the level shift starts an incident of its own
    assert after.events and {ev.incident_start for ev in after.events} == {min(ev.start for ev in after.events)}


def test_a_meter_reset_is_an_incident_of_its_own():
    deltas = ar1(699, seed=32, phi=0.5, mean=20.0, sd=2.0)
    readings = 1000.0 + np.concatenate([[0.0], np.cumsum(deltas)])
    readings[500:] = 3.0 + (readings[500:] - readings[500])
    out = drive(Engine(lambda feed_id: settings(counter=True)), readings)
    (event,) = out.events
    assert event.rule == "meter_reset" and event.incident_start == event.start == at(500)
