"""Incidents in the store: ``events.incident_start``, the incident listing, accept notes and service marks.

Runs on SQLite and PostgreSQL (the ``store_url`` fixture of ``store_helpers``).
The incident of an event is the one the engine gave it
(:mod:`leadline.detector.incidents`); the store keeps it and the listing
groups by it, so the expected groups here are written out by hand.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import pytest

from leadline.adapters.cli import main
from leadline.adapters.store import open_store, upgrade_store
from leadline.adapters.store import schema
from leadline.adapters.store.connect import create_store_engine, resolve_url, write_transaction
from leadline.adapters.store.migrations import create_schema
from leadline.adapters.store.queries import group_incidents
from leadline.detector.errors import StoreError
from leadline.detector.events import CAUTION, AlarmEvent

from store_helpers import store_url  # noqa: F401 - fixture

UTC = timezone.utc
T0 = datetime(2026, 4, 2, 3, 0, tzinfo=UTC)
FLOW = "quarrow/flow/fm-07"
LEVEL = "quarrow/level/lt-03"


def at(minutes: float) -> datetime:
    return T0 + timedelta(minutes=minutes)


def ev(feed: str, rule: str, start: float, end: float | None, incident: float | None, severity: str = "alarm",
       peak: float = float("nan")) -> AlarmEvent:
    return AlarmEvent(feed_id=feed, rule=rule, severity=severity, start=at(start),
                      end=None if end is None else at(end), peak_abs_z=peak, detail=f"{rule} at {start}",
                      incident_start=None if incident is None else at(incident))


EVENTS = [
    ev(FLOW, "spike", 0, 1, 0, peak=6.5),              # incident A: spike + cusum, the cusum still active
    ev(FLOW, "cusum", 2, None, 0, severity="warning", peak=3.1),
    ev(LEVEL, "flatline", 5, 30, 5, severity="warning"),  # incident B: alone
    ev(FLOW, "noise_burst", 90, 95, 90, peak=4.0),     # incident C: a later incident of the flow feed
    ev(LEVEL, "stale", 200, 210, None),                # stored without an incident: its own
]


@pytest.fixture
def store(store_url):
    s = open_store(store_url)
    for e in EVENTS:
        s.stage_event(e)
    s.flush()
    yield s
    s.close()


def test_incident_start_round_trips_and_an_upsert_keeps_the_first(store):
    got = {(s.event.feed_id, s.event.rule): s for s in store.events()}
    assert got[(FLOW, "cusum")].event.incident_start == at(0)
    assert got[(LEVEL, "stale")].event.incident_start is None
    assert got[(LEVEL, "stale")].incident_start == at(200)
    # the clearing of the cusum episode arrives with another incident start: the stored one stays
    store.stage_event(ev(FLOW, "cusum", 2, 40, 2, severity="warning"))
    store.flush()
    (cusum,) = store.events(rule="cusum")
    assert cusum.event.end == at(40) and cusum.event.incident_start == at(0)


def test_events_group_into_incidents_with_rules_severity_peak_and_the_first_id(store):
    stored = store.events()
    incidents = group_incidents(stored)
    ids = {(s.event.feed_id, s.event.rule): s.id for s in stored}
    assert [(i.feed_id, i.start, i.rules) for i in incidents] == [
        (FLOW, at(0), ("spike", "cusum")), (LEVEL, at(5), ("flatline",)),
        (FLOW, at(90), ("noise_burst",)), (LEVEL, at(200), ("stale",))]
    a = incidents[0]
    assert a.id == ids[(FLOW, "spike")] and a.end is None  # the cusum is still active
    assert a.severity == "alarm" and a.peak_abs_z == 6.5
    assert incidents[1].end == at(30) and incidents[1].severity == "warning"
    assert not a.acknowledged
    store.add_note(ids[(FLOW, "spike")], "ack", "operator-m", "")
    a = group_incidents(store.events())[0]
    assert a.acknowledged_events == 1 and not a.acknowledged


def test_accept_notes_are_listed_after_a_note_id_and_marks_commit_with_a_flush(store):
    (cusum,) = store.events(rule="cusum")
    with pytest.raises(StoreError, match="accept text"):
        store.add_note(cusum.id, "accept", "operator-m", "")
    first = store.add_note(cusum.id, "accept", "operator-m", "new pump duty point", at=at(50))
    store.add_note(cusum.id, "comment", "operator-m", "checked on site")
    second = store.add_note(cusum.id, "accept", "operator-j", "confirmed", at=at(60))
    notes = store.accept_notes_after(0)
    assert [(n.note_id, n.feed_id, n.rule, n.event_start, n.operator, n.at) for n in notes] == [
        (first, FLOW, "cusum", at(2), "operator-m", at(50)), (second, FLOW, "cusum", at(2), "operator-j", at(60))]
    assert [n.note_id for n in store.accept_notes_after(first)] == [second]
    assert store.mark("accept_notes_applied") is None
    store.stage_mark("accept_notes_applied", first)
    assert store.mark("accept_notes_applied") is None  # staged, not committed
    store.flush()
    assert store.mark("accept_notes_applied") == first
    store.stage_mark("accept_notes_applied", second)
    store.flush()
    assert store.mark("accept_notes_applied") == second


def test_the_events_command_lists_one_line_per_incident(store, store_url, capsys):
    argv = ["events", "--db", store_url, "--since", "2026-04-01T00:00Z", "--until", "2026-04-03T00:00Z"]
    assert main(argv + ["--format", "json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["count"] == 4 and document["caution"] == CAUTION
    first = document["incidents"][0]
    assert first["rules"] == ["spike", "cusum"] and first["state"] == "active"
    assert first["incident_start"] == at(0).isoformat() and first["severity"] == "alarm"
    assert [e["rule"] for e in first["events"]] == ["spike", "cusum"]
    assert all(e["incident_start"] == at(0).isoformat() for e in first["events"])
    assert main(argv) == 0
    table = capsys.readouterr().out
    assert "spike + cusum" in table and "4 incidents of 5 events" in table
    assert main(argv + ["--format", "csv"]) == 0
    rows = [r for r in capsys.readouterr().out.splitlines() if not r.startswith("#")]
    assert rows[0].startswith("id,feed_id,incident_start,end,state,rules") and len(rows) == 5
    assert main(argv + ["--each-event", "--format", "json"]) == 0
    per_event = json.loads(capsys.readouterr().out)
    assert per_event["count"] == 5
    assert [e["incident_start"] for e in per_event["events"] if e["rule"] == "stale"] == [at(200).isoformat()]


def test_a_version_3_store_upgrades_with_its_notes_and_takes_accept_notes(store_url):
    engine = create_store_engine(resolve_url(store_url))
    v3 = schema.build_metadata(3)
    with write_transaction(engine, "making a v3 store") as conn:
        create_schema(conn, version=3)
        conn.execute(v3.tables["feeds"].insert(), [{"feed_id": FLOW, "created_at": T0}])
        conn.execute(v3.tables["events"].insert(), [
            {"feed_id": FLOW, "rule": "cusum", "severity": "warning", "start_at": at(i), "parameters": {},
             "detail": "v3", "caution": CAUTION, "created_at": T0, "updated_at": T0, "start_hour": 0}
            for i in range(3)])
        conn.execute(v3.tables["event_notes"].insert().values(event_id=2, feed_id=FLOW, kind="ack",
                                                              operator="operator-k", text="seen", at=T0))
    engine.dispose()
    assert upgrade_store(store_url) == schema.SCHEMA_VERSION
    with open_store(store_url) as s:
        stored = s.events()
        assert [x.incident_start for x in stored] == [at(0), at(1), at(2)]  # each its own incident
        assert [n.operator for n in stored[1].notes] == ["operator-k"]
        note = s.add_note(stored[2].id, "accept", "operator-m", "new level after the valve change")
        later = s.add_note(stored[0].id, "ack", "operator-m", "")
        assert later > note > stored[1].notes[0].id  # ids keep counting after the rebuild
        assert [n.note_id for n in s.accept_notes_after(0)] == [note]
        with pytest.raises(StoreError):
            with write_transaction(s._engine, "editing a note") as conn:
                conn.exec_driver_sql("DELETE FROM event_notes")  # still append-only
