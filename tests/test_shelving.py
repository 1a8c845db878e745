"""Shelving in the ISA-18.2 sense (ANSI/ISA-18.2-2016, clause 13.2: shelving is temporary, has a
maximum duration and is recorded): a shelved feed's events are recorded but not listed by default,
shelving is bounded, a glob shelves a group of feeds one note each, and every note stays.

Real SQLite store; the commands run through ``leadline.adapters.cli.main``.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import pytest

from leadline.adapters.cli import main, review
from leadline.adapters.store.eventstore import open_store
from leadline.detector.events import CAUTION, AlarmEvent

UTC = timezone.utc
NOW = datetime(2026, 10, 20, 9, 0, tzinfo=UTC)
NORTH, SOUTH, LEVEL = "fenwick/north/flow", "fenwick/south/flow", "fenwick/tank/level"


@pytest.fixture
def site(tmp_path, monkeypatch):
    db = tmp_path / "events.db"
    with open_store(str(db)) as store:
        for feed in (NORTH, SOUTH, LEVEL):
            store.ensure_feed(feed, interval_s=900.0, source="fenwick-broker")
        # NORTH was shelved 06:00-08:00; its 07:00 event falls in the shelving, its 08:30 one does not
        store.shelve(NORTH, "A. Mbeki", "valve works", NOW - timedelta(hours=1), at=NOW - timedelta(hours=3))
        for ev in (AlarmEvent(NORTH, "spike", "alarm", NOW - timedelta(hours=2), NOW - timedelta(hours=2),
                              peak_abs_z=8.0, detail="during the works"),
                   AlarmEvent(NORTH, "spike", "alarm", NOW - timedelta(minutes=30), NOW - timedelta(minutes=15),
                              peak_abs_z=7.0, detail="after the works"),
                   AlarmEvent(LEVEL, "cusum", "warning", NOW - timedelta(hours=1, minutes=30), None,
                              detail="level drifting")):
            store.stage_event(ev)
        store.flush()
    monkeypatch.setattr(review, "utc_now", lambda: NOW)

    def run(*argv: str) -> int:
        return main([*argv, "--db", f"sqlite:///{db}"])

    run.db = db
    return run


def test_events_of_a_shelved_feed_are_left_out_unless_asked_for(site, capsys):
    assert site("events", "--each-event", "--since", "12h", "--format", "json") == 0
    listed = [e["detail"] for e in json.loads(capsys.readouterr().out)["events"]]
    assert listed == ["level drifting", "after the works"]
    assert site("events", "--each-event", "--since", "12h", "--format", "json", "--include-shelved") == 0
    listed = [e["detail"] for e in json.loads(capsys.readouterr().out)["events"]]
    assert listed == ["during the works", "level drifting", "after the works"]
    assert site("events", "--since", "12h") == 0
    out = capsys.readouterr().out
    assert "1 event of shelved feeds not listed (--include-shelved lists them)." in out
    assert "during the works" not in out
    # export keeps every record
    assert site("export", "--since", "12h", "--format", "json") == 0
    assert json.loads(capsys.readouterr().out)["count"] == 3


def test_summary_leaves_out_shelved_alarms_unless_asked_for(site, capsys):
    assert site("summary", "--since", "12h") == 0
    out = capsys.readouterr().out
    assert "2 alarms started" in out and "1 alarm of shelved feeds left out" in out
    assert out.count(CAUTION) == 1
    assert site("summary", "--since", "12h", "--include-shelved") == 0
    assert "3 alarms started" in capsys.readouterr().out


def test_shelving_is_bounded_replaced_in_words_and_ended_only_when_in_force(site, capsys):
    assert site("shelve", LEVEL, "--for", "400d", "--by", "A. Mbeki", "--note", "forever") == 2
    err = capsys.readouterr().err
    assert "--for 400d" in err and "longest shelving, 7 d 0 h 0 min" in err
    assert site("shelve", LEVEL, "--end", "--by", "A. Mbeki", "--note", "done") == 2
    assert f"--end: {LEVEL} is not shelved" in capsys.readouterr().err
    assert site("shelve", LEVEL, "--for", "8h", "--by", "", "--note", "x") == 2
    assert "--by must not be empty" in capsys.readouterr().err

    assert site("shelve", LEVEL, "--for", "2h", "--by", "A. Mbeki", "--note", "tank cleaning") == 0
    capsys.readouterr()
    assert site("shelve", LEVEL, "--for", "6h", "--by", "J. Osei", "--note", "cleaning runs long") == 0
    out = capsys.readouterr().out
    assert "replaces the shelving by A. Mbeki until 2026-10-20 11:00" in out
    assert site("shelve", LEVEL, "--end", "--by", "J. Osei", "--note", "tank back") == 0
    assert "Ended the shelving of fenwick/tank/level by J. Osei" in capsys.readouterr().out
    with open_store(str(site.db)) as store:
        trail = [(n.operator, n.text) for n in store.shelving_notes() if n.feed_id == LEVEL]
        assert trail == [("A. Mbeki", "tank cleaning"), ("J. Osei", "cleaning runs long"), ("J. Osei", "tank back")]
        assert LEVEL not in {n.feed_id for n in store.shelved_feeds(NOW)}


def test_a_glob_shelves_a_group_each_recorded(site, capsys):
    assert site("shelve", "fenwick/*/flow", "--for", "4h", "--by", "A. Mbeki", "--note", "district works") == 0
    out = capsys.readouterr().out
    assert "2 feeds shelved" in out
    with open_store(str(site.db)) as store:
        shelved = {n.feed_id for n in store.shelved_feeds(NOW)}
        assert shelved == {NORTH, SOUTH}
        assert len([n for n in store.shelving_notes() if n.text == "district works"]) == 2
    assert site("shelve", "fenwick/*/pressure", "--for", "4h", "--by", "A. Mbeki", "--note", "x") == 2
    assert "no feed matches 'fenwick/*/pressure'" in capsys.readouterr().err


def test_the_maximum_comes_from_the_config(tmp_path, monkeypatch, capsys):
    config = tmp_path / "leadline.toml"
    db = tmp_path / "events.db"
    config.write_text(f'[store]\nurl = "{db.name}"\n\n[shelving]\nmax_duration = "30d"\n')
    with open_store(str(db)) as store:
        store.ensure_feed(LEVEL)
    monkeypatch.setattr(review, "utc_now", lambda: NOW)
    assert main(["shelve", LEVEL, "--for", "20d", "--by", "A. Mbeki", "--note", "long works",
                 "--config", str(config)]) == 0
    assert main(["shelve", LEVEL, "--for", "31d", "--by", "A. Mbeki", "--note", "longer",
                 "--config", str(config)]) == 2
    assert "longest shelving, 30 d 0 h 0 min" in capsys.readouterr().err
