"""The review commands against a real SQLite store filled through EventStore.

Shift windows are checked against the civil-time rules they must follow: Europe/London keeps GMT
(UTC+0) in winter and BST (UTC+1) from 01:00 UTC on the last Sunday of March (EU Directive
2000/84/EC, Article 2; the same rule is in the IANA tz database entry for Europe/London). So on
2026-03-29 a night shift 18:00-06:00 local runs from 18:00Z to 05:00Z: 11 hours.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from leadline.adapters.cli import review
from leadline.adapters.cli import main
from leadline.adapters.config import config_from_text
from leadline.adapters.cli.formats import CSV_COLUMNS
from leadline.adapters.config.shifts import shift_window
from leadline.adapters.sinks.alarm_publisher import event_payload
from leadline.adapters.ports import RejectSample
from leadline.adapters.store.eventstore import open_store
from leadline.detector.errors import ConfigError, DataError
from leadline.detector.events import CAUTION, AlarmEvent

UTC = timezone.utc
#: A Saturday in March 2026, before the change to summer time: London time = UTC.
NOW = datetime(2026, 3, 14, 9, 30, tzinfo=UTC)

CONFIG = """
[store]
url = "events.db"

[shifts]
timezone = "Europe/London"
day = "06:00-18:00"
night = "18:00-06:00"
"""

FLOW1, FLOW2 = "marrowby/flow/dm-01", "marrowby/flow/dm-02"
LEVEL, PUMP = "marrowby/reservoir/north/level", "marrowby/pumps/ps1/pressure"


def t(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)


EVENTS = {
    # night shift of the 13th (18:00Z 13th to 06:00Z 14th)
    "night_cusum": AlarmEvent(FLOW1, "cusum", "alarm", t("2026-03-13T22:15"), t("2026-03-13T23:40"), peak_abs_z=5.2,
                              value_at_onset=41.2, forecast_at_onset=12.3, lower_at_onset=8.0, upper_at_onset=16.6,
                              parameters={"k": 0.5, "h": 5.0}, model_version=1, detail="minimum night flow up"),
    "night_spike": AlarmEvent(FLOW2, "spike", "warning", t("2026-03-14T03:00"), t("2026-03-14T03:15"),
                              peak_abs_z=4.4, value_at_onset=3.0, parameters={"warning_abs_z": 4.0,
                                                                               "unused": float("nan")},
                              detail="one wild reading"),
    # day shift of the 14th (now on), still active
    "day_flatline": AlarmEvent(LEVEL, "flatline", "alarm", t("2026-03-14T07:00"), None, value_at_onset=4.25,
                               forecast_at_onset=4.31, detail="level unchanged for 12 readings"),
    # day shift of the 13th
    "earlier_spike": AlarmEvent(PUMP, "spike", "alarm", t("2026-03-13T12:00"), t("2026-03-13T12:30"),
                                peak_abs_z=7.9, value_at_onset=6.8, forecast_at_onset=4.2, detail="pressure jump"),
    # days ago: outside the default 24 h window
    "old_stale": AlarmEvent(PUMP, "stale", "warning", t("2026-03-10T10:00"), t("2026-03-10T11:00"),
                            detail="no readings for 5 intervals"),
}


@dataclass
class Site:
    config: Path
    db: Path
    ids: dict[str, int]

    def store(self):
        return open_store(str(self.db))

    def run(self, *argv: str) -> int:
        return main([*argv, "--config", str(self.config)])


@pytest.fixture
def site(tmp_path, monkeypatch):
    config = tmp_path / "leadline.toml"
    config.write_text(CONFIG)
    db = tmp_path / "events.db"
    with open_store(str(db)) as store:
        for feed, source in ((FLOW1, "marrowby-broker"), (FLOW2, "marrowby-broker"), (LEVEL, "marrowby-broker"),
                             (PUMP, "scada-export")):
            store.ensure_feed(feed, unit=None, interval_s=900.0, source=source)
        store.record_model(FLOW1, "ARIMA(1,0,1)", {"ar.L1": 0.6}, {"mode": "budget"}, {"aicc": 10.0},
                           fitted_at=NOW - timedelta(hours=3, minutes=20), window_start=NOW - timedelta(days=14),
                           window_end=NOW - timedelta(hours=3, minutes=30), reason="first fit")
        store.record_model(PUMP, "ARIMA(2,0,0)", {}, {}, {}, fitted_at=NOW - timedelta(days=2),
                           window_start=NOW - timedelta(days=16), window_end=NOW - timedelta(days=2),
                           reason="first fit")
        store.record_model(PUMP, "ARIMA(1,0,0)", {}, {}, {}, fitted_at=NOW - timedelta(hours=8),
                           window_start=NOW - timedelta(days=14), window_end=NOW - timedelta(hours=8),
                           reason="scheduled refit")
        for ev in EVENTS.values():
            store.stage_event(ev)
        store.stage_reject(RejectSample("scada-export", "bad_time", "station-3.csv:12", "31.02.2026 is no date",
                                        b"31.02.2026 10:00;4.1", NOW - timedelta(hours=1)))
        store.flush()
        ids = {name: next(s.id for s in store.events() if s.event.key == ev.key) for name, ev in EVENTS.items()}
    monkeypatch.setattr(review, "utc_now", lambda: NOW)
    return Site(config, db, ids)


def listed_ids(out: str) -> list[int]:
    """The ids of the table's rows: lines that start with an id followed by a date."""
    rows = []
    for line in out.splitlines():
        parts = line.split()
        if len(parts) > 1 and parts[0].isdigit() and len(parts[1]) == 10 and parts[1][4] == "-":
            rows.append(int(parts[0]))
    return rows


def row_of(out: str, event_id: int) -> str:
    return next(line for line in out.splitlines() if line.split()[:1] == [str(event_id)]
                and len(line.split()) > 1 and line.split()[1][4:5] == "-")


def names(site: Site, ids: list[int]) -> list[str]:
    by_id = {v: k for k, v in site.ids.items()}
    return [by_id[i] for i in ids]


# ------------------------------------------------------------------------------ events: windows and filters
def test_default_window_is_the_last_24_hours_oldest_first(site, capsys):
    assert site.run("events", "--each-event") == 0
    out = capsys.readouterr().out
    assert names(site, listed_ids(out)) == ["earlier_spike", "night_cusum", "night_spike", "day_flatline"]
    lines = out.splitlines()
    assert lines[-1] == CAUTION  # the listing ends with the caution line
    assert "4 events (1 active, 4 unacknowledged)." in lines
    assert lines[0].startswith("Events that started 2026-03-13 09:30 GMT to now")
    assert "times in Europe/London" in lines[0]
    row = row_of(out, site.ids["night_cusum"])
    assert "2026-03-13 22:15 GMT" in row and "2026-03-13 23:40 GMT" in row and "cusum" in row and "5.2" in row
    active = row_of(out, site.ids["day_flatline"])
    assert " active " in active


def test_since_is_inclusive_and_until_exclusive(site, capsys):
    assert site.run("events", "--each-event", "--since", "2026-03-13T22:15Z", "--until", "2026-03-14T03:00Z") == 0
    assert names(site, listed_ids(capsys.readouterr().out)) == ["night_cusum"]
    # a local time without an offset is read in the [shifts] zone (GMT in March before the 29th)
    assert site.run("events", "--each-event", "--since", "2026-03-14T03:00", "--until", "2026-03-14T07:00:01") == 0
    assert names(site, listed_ids(capsys.readouterr().out)) == ["night_spike", "day_flatline"]
    # a span back from now
    assert site.run("events", "--each-event", "--since", "7d") == 0
    assert len(listed_ids(capsys.readouterr().out)) == 5


@pytest.mark.parametrize("args, expected", [
    (("--feed", "marrowby/flow/*"), ["night_cusum", "night_spike"]),
    (("--feed", "marrowby/flow/dm-0[2]"), ["night_spike"]),
    (("--rule", "spike"), ["earlier_spike", "night_spike"]),
    (("--severity", "warning"), ["night_spike"]),
    (("--rule", "spike", "--severity", "alarm"), ["earlier_spike"]),
    (("--limit", "2"), ["earlier_spike", "night_cusum"]),
])
def test_filters(site, capsys, args, expected):
    assert site.run("events", "--each-event", *args) == 0
    assert names(site, listed_ids(capsys.readouterr().out)) == expected


def test_unacked_leaves_out_acknowledged_events(site, capsys):
    assert site.run("ack", str(site.ids["night_cusum"]), "--by", "R. Okonkwo") == 0
    capsys.readouterr()
    assert site.run("events", "--each-event", "--unacked") == 0
    out = capsys.readouterr().out
    assert names(site, listed_ids(out)) == ["earlier_spike", "night_spike", "day_flatline"]
    assert site.run("events", "--each-event", "--feed", FLOW1) == 0
    row = row_of(capsys.readouterr().out, site.ids["night_cusum"])
    assert "R. Okonkwo" in row


def test_unknown_rule_gets_a_hint(site, capsys):
    assert site.run("events", "--each-event", "--rule", "spkie") == 0
    captured = capsys.readouterr()
    assert "No events." in captured.out and captured.out.splitlines()[-1] == CAUTION
    assert "no rule named 'spkie' is known" in captured.err and 'did you mean "spike"?' in captured.err


# ------------------------------------------------------------------------------ shifts
@pytest.mark.parametrize("selector, expected, heading", [
    ("last", ["night_cusum", "night_spike"], "Events of the night shift of 2026-03-13 (Europe/London): started "
                                             "2026-03-13 18:00 GMT to 2026-03-14 06:00 GMT;"),
    ("current", ["day_flatline"], "Events of the day shift of 2026-03-14 "),
    ("day", ["day_flatline"], "Events of the day shift of 2026-03-14 "),
    ("night", ["night_cusum", "night_spike"], "Events of the night shift of 2026-03-13 "),
    ("2026-03-13/day", ["earlier_spike"], "Events of the day shift of 2026-03-13 (Europe/London): started "
                                          "2026-03-13 06:00 GMT to 2026-03-13 18:00 GMT;"),
    ("2026-03-09/night", [], "Events of the night shift of 2026-03-09 "),
])
def test_shift_selectors(site, capsys, selector, expected, heading):
    assert site.run("events", "--each-event", "--shift", selector) == 0
    out = capsys.readouterr().out
    assert names(site, listed_ids(out)) == expected
    assert out.splitlines()[0].startswith(heading)
    assert out.splitlines()[-1] == CAUTION


def test_shift_needs_shifts_and_excludes_since(site, capsys, tmp_path):
    assert main(["events", "--each-event", "--shift", "last", "--db", str(site.db)]) == 2
    assert "--shift needs a config file with a [shifts] table" in capsys.readouterr().err
    assert site.run("events", "--each-event", "--shift", "last", "--since", "2h") == 2
    assert "--shift cannot be combined with --since" in capsys.readouterr().err
    assert site.run("events", "--each-event", "--shift", "nigth") == 2
    err = capsys.readouterr().err
    assert "no shift named 'nigth'" in err and 'did you mean "night"?' in err
    assert site.run("events", "--each-event", "--shift", "14.03.2026/day") == 2
    assert "is not a date such as 2026-03-14" in capsys.readouterr().err


def shifts_of(text: str):
    return config_from_text(text, Path("/tmp/x.toml")).shifts


def test_shift_windows_across_the_summer_time_change():
    shifts = shifts_of(CONFIG)
    after = datetime(2026, 3, 29, 10, 0, tzinfo=UTC)  # 11:00 BST
    night = shift_window(shifts, "2026-03-28/night", after)
    # 18:00 GMT = 18:00Z; 06:00 BST = 05:00Z (EU Directive 2000/84/EC: the change at 01:00Z on 29 March 2026)
    assert (night.start, night.end) == (t("2026-03-28T18:00"), t("2026-03-29T05:00"))
    assert night.end - night.start == timedelta(hours=11)
    assert shift_window(shifts, "last", after) == night
    day = shift_window(shifts, "current", after)
    assert (day.start, day.end) == (t("2026-03-29T05:00"), t("2026-03-29T17:00"))
    # the autumn change (last Sunday of October, 01:00Z): the night of 24 October lasts 13 hours
    autumn = shift_window(shifts, "2026-10-24/night", after)
    assert (autumn.start, autumn.end) == (t("2026-10-24T17:00"), t("2026-10-25T06:00"))


def test_current_shift_at_a_boundary_and_in_a_gap():
    shifts = shifts_of(CONFIG)
    at_six = datetime(2026, 1, 5, 6, 0, tzinfo=UTC)
    assert shift_window(shifts, "current", at_six).name == "day"  # start inclusive, end exclusive
    assert shift_window(shifts, "last", at_six).label == "night of 2026-01-04"
    gappy = shifts_of('[shifts]\ntimezone = "UTC"\nearly = "06:00-14:00"\n')
    with pytest.raises(ConfigError, match="no shift is on at 2026-01-05 15:00 UTC"):
        shift_window(gappy, "current", datetime(2026, 1, 5, 15, 0, tzinfo=UTC))
    overlap = shifts_of('[shifts]\ntimezone = "UTC"\na = "06:00-14:30"\nb = "14:00-22:00"\n')
    assert shift_window(overlap, "current", datetime(2026, 1, 5, 14, 10, tzinfo=UTC)).name == "b"  # latest started


def test_dst_shift_through_the_command(tmp_path, monkeypatch, capsys):
    config = tmp_path / "leadline.toml"
    config.write_text(CONFIG)
    with open_store(str(tmp_path / "events.db")) as store:
        store.ensure_feed(FLOW1)
        for start in ("2026-03-29T04:30", "2026-03-29T05:30"):  # 05:30 BST (night) and 06:30 BST (day)
            store.stage_event(AlarmEvent(FLOW1, "spike", "alarm", t(start)))
        store.flush()
    monkeypatch.setattr(review, "utc_now", lambda: datetime(2026, 3, 29, 12, 0, tzinfo=UTC))
    assert main(["events", "--each-event", "--shift", "last", "--config", str(config), "--format", "json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert [e["start"] for e in document["events"]] == ["2026-03-29T04:30:00+00:00"]
    assert document["window"] == {"since": "2026-03-28T18:00:00+00:00", "until": "2026-03-29T05:00:00+00:00",
                                  "shift": "night of 2026-03-28", "timezone": "Europe/London"}


# ------------------------------------------------------------------------------ formats
def test_csv_format(site, capsys):
    assert site.run("events", "--each-event", "--format", "csv") == 0
    body = capsys.readouterr().out
    assert not body.startswith("\ufeff") and "\n#" not in body  # no trailer: every line is a record
    rows = list(csv.DictReader(io.StringIO(body)))
    assert all(r["caution"] == CAUTION for r in rows)
    assert tuple(rows[0]) == CSV_COLUMNS
    assert [int(r["id"]) for r in rows] == [site.ids[n] for n in ("earlier_spike", "night_cusum", "night_spike",
                                                                  "day_flatline")]
    cusum = rows[1]
    assert (cusum["feed_id"], cusum["rule"], cusum["severity"], cusum["state"]) == (FLOW1, "cusum", "alarm", "cleared")
    assert cusum["start"] == "2026-03-13T22:15:00+00:00" and cusum["end"] == "2026-03-13T23:40:00+00:00"
    assert float(cusum["peak_abs_z"]) == 5.2 and float(cusum["upper_at_onset"]) == 16.6
    assert json.loads(cusum["parameters"]) == {"h": 5.0, "k": 0.5}
    assert cusum["caution"] == CAUTION and cusum["acknowledged"] == "no"
    spike = rows[2]
    assert spike["forecast_at_onset"] == "" and spike["model_version"] == ""  # NaN and None are empty cells
    assert rows[3]["state"] == "active" and rows[3]["end"] == ""


def test_json_format(site, capsys):
    assert site.run("events", "--each-event", "--format", "json", "--feed", "marrowby/flow/*") == 0
    document = json.loads(capsys.readouterr().out)
    assert list(document)[-1] == "caution" and document["caution"] == CAUTION
    assert document["count"] == 2 and document["filters"] == {"feed": "marrowby/flow/*", "rule": None,
                                                              "severity": None, "unacked": False,
                                                              "include_shelved": False}
    assert document["window"]["since"] == "2026-03-13T09:30:00+00:00" and document["window"]["until"] is None
    cusum, spike = document["events"]
    assert cusum["id"] == site.ids["night_cusum"] and cusum["model_version"] == 1
    assert cusum["value_at_onset"] == 41.2 and cusum["detail"] == "minimum night flow up"
    assert spike["forecast_at_onset"] is None  # NaN -> null (RFC 8259 has no NaN)
    assert spike["parameters"] == {"warning_abs_z": 4.0, "unused": None}
    assert all(e["caution"] == CAUTION for e in document["events"])


def test_json_events_carry_the_fields_of_the_published_alarm_payload(site, capsys):
    assert site.run("events", "--each-event", "--format", "json") == 0
    record = json.loads(capsys.readouterr().out)["events"][0]
    payload = event_payload(EVENTS["earlier_spike"])
    assert set(payload) <= set(record)
    for key in ("feed_id", "rule", "severity", "state", "start", "end", "peak_abs_z", "detail", "caution"):
        assert record[key] == payload[key]


# ------------------------------------------------------------------------------ the audit trail
def test_ack_appends_and_acking_again_appends_again(site, capsys, monkeypatch):
    cusum = site.ids["night_cusum"]
    assert site.run("ack", str(cusum), "--by", "R. Okonkwo", "--note", "burst main found, valve closed") == 0
    out = capsys.readouterr().out
    assert out.startswith(f"Acknowledged event {cusum} ({FLOW1} cusum alarm, started 2026-03-13 22:15 GMT) as "
                          "R. Okonkwo")
    later = NOW + timedelta(minutes=5)
    monkeypatch.setattr(review, "utc_now", lambda: later)
    assert site.run("ack", str(cusum), "--by", "T. Hale") == 0
    assert "it was already acknowledged by R. Okonkwo at 2026-03-14 09:30 GMT" in capsys.readouterr().out
    with site.store() as store:
        notes = store.event(cusum).notes
    assert [(n.kind, n.operator, n.text, n.at) for n in notes] == [
        ("ack", "R. Okonkwo", "burst main found, valve closed", NOW), ("ack", "T. Hale", "", later)]


def test_ack_of_several_and_of_an_unknown_id(site, capsys):
    a, b = site.ids["night_cusum"], site.ids["night_spike"]
    assert site.run("ack", str(a), "999", "998", "--by", "R. Okonkwo") == 2
    err = capsys.readouterr().err
    assert "no event with ids 999, 998" in err and "nothing was acknowledged" in err
    with site.store() as store:
        assert store.event(a).notes == ()  # all or nothing: the known one was not acknowledged either
    assert site.run("ack", str(a), str(b), str(a), "--by", "R. Okonkwo") == 0
    assert capsys.readouterr().out.count("Acknowledged event") == 2  # a repeated id counts once
    with site.store() as store:
        assert len(store.event(a).notes) == 1 and store.event(b).acknowledged


def test_note_appends_a_comment(site, capsys):
    level = site.ids["day_flatline"]
    assert site.run("note", str(level), "--by", "T. Hale", "--note", "float switch stuck, crew sent") == 0
    assert f"to event {level}" in capsys.readouterr().out
    with site.store() as store:
        (note,) = store.event(level).notes
        assert (note.kind, note.operator, note.text, note.at) == ("comment", "T. Hale", "float switch stuck, crew sent",
                                                                  NOW)
        assert not store.event(level).acknowledged  # a comment is not an acknowledgement
    assert site.run("note", "4242", "--by", "T. Hale", "--note", "x") == 2
    assert "no event with id 4242" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        site.run("note", str(level), "--by", "T. Hale")  # --note is required for a comment


def test_shelve_for_a_while_then_end_it(site, capsys, monkeypatch):
    assert site.run("shelve", PUMP, "--for", "8h", "--by", "R. Okonkwo", "--note", "transmitter swap") == 0
    assert f"Shelved {PUMP} until 2026-03-14 17:30 GMT as R. Okonkwo" in capsys.readouterr().out
    with site.store() as store:
        (shelving,) = store.shelved_feeds(NOW)
        assert (shelving.feed_id, shelving.at, shelving.expires_at) == (PUMP, NOW, NOW + timedelta(hours=8))
        assert shelving.operator == "R. Okonkwo" and shelving.text == "transmitter swap"
    assert site.run("status") == 0
    row = next(line for line in capsys.readouterr().out.splitlines() if line.startswith(PUMP))
    assert "2026-03-14 17:30 GMT (R. Okonkwo)" in row

    monkeypatch.setattr(review, "utc_now", lambda: NOW + timedelta(hours=1))
    assert site.run("shelve", PUMP, "--end", "--by", "R. Okonkwo", "--note", "swap done") == 0
    assert f"Ended the shelving of {PUMP}" in capsys.readouterr().out
    with site.store() as store:
        assert store.shelved_feeds(NOW + timedelta(hours=1)) == []
        # nothing was edited: both shelving notes are kept
        assert len(store.shelved_feeds(NOW + timedelta(minutes=30))) == 1


def test_shelve_errors(site, capsys):
    assert site.run("shelve", "marrowby/pumps/ps9/pressure", "--for", "8h", "--by", "X", "--note", "y") == 2
    err = capsys.readouterr().err
    assert "no feed 'marrowby/pumps/ps9/pressure'" in err and f'did you mean "{PUMP}"?' in err
    assert site.run("shelve", PUMP, "--by", "X", "--note", "y") == 2
    assert "give --for DURATION" in capsys.readouterr().err
    assert site.run("shelve", PUMP, "--for", "8 hours", "--by", "X", "--note", "y") == 2
    assert "expected a duration such as 30min, 8h or 2d" in capsys.readouterr().err


# ------------------------------------------------------------------------------ status and export
def test_status_table_without_a_service(site, capsys):
    assert site.run("status") == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "Status as of 2026-03-14 09:30 GMT; store sqlite:///" + str(site.db)
    assert lines[1].startswith("Service: no running service has written to this store")
    assert lines[-1] == CAUTION and sum(line == CAUTION for line in lines) == 1
    row = {line.split()[0]: line for line in lines if line.startswith("marrowby/")}
    assert set(row) == {FLOW1, FLOW2, LEVEL, PUMP}
    # no heartbeat: a feed with a model is not shown as watching
    assert "stopped (was watching)" in row[FLOW1] and "v1: ARIMA(1,0,1)" in row[FLOW1]
    assert "v2: ARIMA(1,0,0)" in row[PUMP]  # the latest model version
    assert "learning" in row[LEVEL] and "1: flatline alarm (unacked)" in row[LEVEL]
    assert all(" watching " not in line for line in row.values())
    # the open stale-free flatline alarm does not make LEVEL stale; nothing has a last reading
    rejects = next(line for line in lines if line.startswith("scada-export"))
    assert rejects.split()[:3] == ["scada-export", "bad_time", "1"]
    assert any("STATE is inferred from the model records" in line for line in lines)


def test_status_is_a_health_view_of_the_running_service(site, capsys, monkeypatch):
    from leadline.adapters.ports import FeedStatusRow, Heartbeat

    with open_store(str(site.db)) as store:
        store.record_model(FLOW2, "ARIMA(1,0,0)", {}, {}, {
            "description": "daily cycle, 2 harmonics; AR(1) + const",
            "problems": ["residuals autocorrelated"],
            "advice": [{"kind": "autocorrelated", "text": "residuals autocorrelated (Ljung-Box p = 0.001)",
                        "remedy": "try a higher AR order"}]},
            fitted_at=NOW - timedelta(hours=1), window_start=NOW - timedelta(days=14),
            window_end=NOW - timedelta(hours=1), reason="first fit")
        # FLOW1 read 10 min ago (fresh); FLOW2 read 2 h ago at 15-min intervals (stale); LEVEL learning
        store.stage_feed_status(FeedStatusRow(FLOW1, "watching", NOW - timedelta(minutes=10), 12.345678,
                                              "marrowby-broker", "m3/h", 900.0, None, None))
        store.stage_feed_status(FeedStatusRow(FLOW2, "watching", NOW - timedelta(hours=2), 3.0,
                                              "marrowby-broker", "m3/h", 900.0, None, None))
        store.stage_feed_status(FeedStatusRow(LEVEL, "learning", NOW - timedelta(minutes=5), 4.25,
                                              "marrowby-broker", "m", 900.0, 312, 672))
        store.stage_heartbeat(Heartbeat("leadline", NOW - timedelta(days=1, hours=2), NOW - timedelta(seconds=4),
                                        5.0, 4242, "0.1.0"))
        store.shelve(PUMP, "R. Okonkwo", "pump overhaul", NOW + timedelta(hours=8), at=NOW - timedelta(minutes=1))
        store.flush()
    assert site.run("status") == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[1].startswith("Service: running since 2026-03-13 07:30 GMT (pid 4242, leadline 0.1.0; last beat 4 s")
    feed_lines = [line for line in lines if line.startswith("marrowby/")]
    assert feed_lines[0].startswith(FLOW2)  # the stale feed first
    row = {line.split()[0]: line for line in feed_lines}
    assert "3 m3/h at 2026-03-14 07:30 GMT" in row[FLOW2] and "2 h 0 min STALE" in row[FLOW2]
    assert "v1: daily cycle, 2 harmonics; AR(1) + const" in row[FLOW2]
    assert "residuals autocorrelated (Ljung-Box p = 0.001) (advice: try a higher AR order)" in row[FLOW2]
    assert "12.35 m3/h at 2026-03-14 09:20 GMT" in row[FLOW1] and " watching " in row[FLOW1]
    assert "STALE" not in row[FLOW1] and "10 min" in row[FLOW1]
    assert "learning 312 of 672" in row[LEVEL]
    assert "2026-03-14 17:30 GMT (R. Okonkwo)" in row[PUMP]

    # the beat gets old: the service is taken as stopped, and no feed is "watching"
    late = NOW + timedelta(minutes=5)
    monkeypatch.setattr(review, "utc_now", lambda: late)
    assert site.run("status", "--format", "json") == 0
    document = json.loads(capsys.readouterr().out)
    assert document["service"]["alive"] is False and document["service"]["pid"] == 4242
    feeds = {f["feed_id"]: f for f in document["feeds"]}
    assert feeds[FLOW1]["state"] == "watching" and feeds[FLOW1]["state_shown"] == "stopped (was watching)"
    assert feeds[LEVEL]["learning"] == {"readings": 312, "needed": 672}
    assert feeds[FLOW1]["unit"] == "m3/h" and feeds[FLOW1]["state_from"] == "service"


def test_status_json(site, capsys):
    assert site.run("status", "--format", "json") == 0
    document = json.loads(capsys.readouterr().out)
    assert list(document)[-1] == "caution" and document["caution"] == CAUTION
    feeds = {f["feed_id"]: f for f in document["feeds"]}
    assert feeds[FLOW1]["model"]["version"] == 1 and feeds[FLOW1]["model"]["age_s"] == 3 * 3600 + 20 * 60
    assert feeds[LEVEL]["model"] is None and feeds[LEVEL]["state"] == "learning"
    assert feeds[LEVEL]["active_alarms"] == [{"id": site.ids["day_flatline"], "rule": "flatline",
                                              "severity": "alarm", "start": "2026-03-14T07:00:00+00:00",
                                              "acknowledged": False}]
    assert feeds[LEVEL]["state_from"] == "model records" and feeds[LEVEL]["last_reading_at"] is None
    assert feeds[PUMP]["source"] == "scada-export"
    assert document["rejects"] == [{"source": "scada-export", "reason": "bad_time", "count": 1,
                                    "first_seen": "2026-03-14T08:30:00+00:00",
                                    "last_seen": "2026-03-14T08:30:00+00:00"}]


def test_export_with_notes(site, capsys, tmp_path):
    assert site.run("export") == 2
    assert "export needs a window" in capsys.readouterr().err
    assert site.run("ack", str(site.ids["night_cusum"]), "--by", "R. Okonkwo", "--note", "valve closed") == 0
    assert site.run("note", str(site.ids["night_cusum"]), "--by", "T. Hale", "--note", "repair booked") == 0
    capsys.readouterr()
    out = tmp_path / "week.json"
    assert site.run("export", "--since", "7d", "--format", "json", "--out", str(out)) == 0
    assert "5 events written to" in capsys.readouterr().err
    document = json.loads(out.read_text())
    assert document["count"] == 5 and document["caution"] == CAUTION
    cusum = next(e for e in document["events"] if e["id"] == site.ids["night_cusum"])
    assert cusum["acknowledged"] is True
    assert [(n["kind"], n["operator"], n["text"]) for n in cusum["notes"]] == [
        ("ack", "R. Okonkwo", "valve closed"), ("comment", "T. Hale", "repair booked")]

    assert site.run("export", "--shift", "last") == 0  # CSV by default
    body = capsys.readouterr().out
    rows = list(csv.DictReader(io.StringIO(body)))
    assert rows[-1]["caution"] == CAUTION
    assert [int(r["id"]) for r in rows] == [site.ids["night_cusum"], site.ids["night_spike"]]
    assert rows[0]["acknowledged_by"] == "R. Okonkwo" and rows[0]["acknowledged_at"] == "2026-03-14T09:30:00+00:00"
    assert rows[0]["notes"].splitlines() == ["2026-03-14T09:30:00+00:00 ack by R. Okonkwo: valve closed",
                                             "2026-03-14T09:30:00+00:00 comment by T. Hale: repair booked"]


# ------------------------------------------------------------------------------ finding the store, reading times
def test_a_missing_store_is_an_error_and_is_not_created(tmp_path, capsys):
    missing = tmp_path / "nope.db"
    assert main(["events", "--each-event", "--db", str(missing)]) == 2
    assert f"no event store at {missing}" in capsys.readouterr().err
    assert not missing.exists()


def test_db_option_reads_the_same_store(site, capsys):
    assert main(["events", "--each-event", "--db", str(site.db), "--since", "7d"]) == 0
    out = capsys.readouterr().out
    assert len(listed_ids(out)) == 5 and "times in UTC" in out


def test_config_from_the_environment(site, capsys, monkeypatch):
    monkeypatch.setenv("LEADLINE_CONFIG", str(site.config))
    assert main(["events", "--each-event", "--shift", "last"]) == 0
    assert names(site, listed_ids(capsys.readouterr().out)) == ["night_cusum", "night_spike"]


def test_parse_time():
    london = ZoneInfo("Europe/London")
    assert review.parse_time("2026-03-14T18:00Z", "--since", NOW, london) == t("2026-03-14T18:00")
    assert review.parse_time("2026-07-01T18:00", "--since", NOW, london) == t("2026-07-01T17:00")  # BST = UTC+1
    assert review.parse_time("2026-07-01", "--since", NOW, london) == t("2026-06-30T23:00")
    assert review.parse_time("2026-07-01T18:00+02:00", "--since", NOW, london) == t("2026-07-01T16:00")
    assert review.parse_time("12h", "--since", NOW, london) == NOW - timedelta(hours=12)
    assert review.parse_time("now", "--until", NOW, london) == NOW
    with pytest.raises(DataError, match="--since 'yesterday': expected an ISO 8601 time"):
        review.parse_time("yesterday", "--since", NOW, london)


def test_until_before_since_is_refused(site, capsys):
    assert site.run("events", "--each-event", "--since", "2h", "--until", "3h") == 2
    assert "is not after --since" in capsys.readouterr().err


def test_show_age_is_the_one_duration_formatter():
    from leadline.adapters.report import figures
    from leadline.detector.durations import human_duration

    assert figures.human_duration is human_duration
    assert [review.show_age(s) for s in (5, 125, 3600, 3 * 3600 + 20 * 60, 86400, 2 * 86400 + 4 * 3600)] == [
        "5 s", "2 min", "1 h 0 min", "3 h 20 min", "1 d 0 h 0 min", "2 d 4 h 0 min"]
