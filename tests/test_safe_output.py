"""Safe output: control characters escaped in tables, statuses and logs; CSV formula cells defused.

Formula-like cells follow the OWASP "CSV Injection" guidance: a cell starting with ``=``, ``+``,
``-``, ``@``, tab or carriage return is prefixed with a single quote. The characters escaped are
those a terminal acts on: C0 and C1 controls and DEL (ECMA-48, 5th edition, 1991, sections 5.2-5.3:
ESC is 0x1B, the 8-bit CSI is 0x9B), and the Unicode bidirectional overrides and isolates (Unicode
Standard Annex #9, section 2), the characters of Boucher & Anderson (2021), "Trojan Source".
"""

from __future__ import annotations

import csv
import io
import json
import logging
import os
import stat
from datetime import datetime, timezone

import pytest

from leadline.adapters.cli import main
from leadline.adapters.service.log_setup import JsonLineFormatter, SafeTextFormatter, configure_logging, syslog_priority
from leadline.adapters.sinks.safe_text import csv_text_cell, safe_text
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.store.eventstore import open_store
from leadline.detector.events import AlarmEvent

UTC = timezone.utc
T0 = datetime(2026, 5, 4, 6, 0, tzinfo=UTC)
RED = "\x1b[31m"


# ------------------------------------------------------------------------------ safe_text
@pytest.mark.parametrize("raw, shown", [
    ("plain/feed-01", "plain/feed-01"),
    (f"{RED}pump{chr(0x1b)}[0m", "\\x1b[31mpump\\x1b[0m"),          # ECMA-48: ESC = 0x1B
    ("a\nb\rc\td", "a\\x0ab\\x0dc\\x09d"),                           # a forged second log line
    ("del\x7f", "del\\x7f"),
    ("csi\x9b2J", "csi\\x9b2J"),                                     # ECMA-48: 8-bit CSI = 0x9B
    ("bidi\u202eevil\u2066x\u2069", "bidi\\u202eevil\\u2066x\\u2069"),  # UAX #9 overrides, isolates
    ("Grünwald/Ω-7", "Grünwald/Ω-7"),                               # ordinary non-ASCII stays
])
def test_safe_text_escapes_controls_and_bidi_and_keeps_ordinary_text(raw, shown):
    assert safe_text(raw) == shown
    assert all(ch.isprintable() for ch in safe_text(raw))


@pytest.mark.parametrize("cell, out", [
    ("=cmd|' /C calc'!A0", "'=cmd|' /C calc'!A0"),
    ("+SUM(A1)", "'+SUM(A1)"),
    ("@x", "'@x"),
    ("-2+3", "'-2+3"),
    ("\tx", "'\tx"),
    ("\rx", "'\rx"),
    ("marrowby/flow/dm-03", "marrowby/flow/dm-03"),
    ("", ""),
])
def test_csv_text_cell_prefixes_formula_starts(cell, out):
    assert csv_text_cell(cell) == out


# ------------------------------------------------------------------------------ end to end: CSV in, table and CSV out
def _follow_one_row(tmp_path, feed: str) -> str:
    """The feed id as the CSV follower reads it from a file's feed column."""
    path = tmp_path / "in.csv"
    with path.open("w", newline="", encoding="utf-8") as handle:
        csv.writer(handle, lineterminator="\n").writerows([("timestamp", "feed", "value"),
                                                           (T0.isoformat(), feed, "-3.5")])
    follower = CsvFollower("scada", str(path), CsvLayout(), from_start=True)
    (reading,) = follower.poll(10, 0.0)
    follower.stop()
    assert reading.value == -3.5
    return reading.feed_id


@pytest.fixture
def hostile_store(tmp_path):
    feed = _follow_one_row(tmp_path, f"pump{RED}7")
    assert feed == f"pump{RED}7"  # read unaltered
    db = tmp_path / "events.db"
    with open_store(str(db)) as store:
        store.stage_event(AlarmEvent(feed, "spike", "alarm", T0, None, peak_abs_z=6.0, value_at_onset=-3.5,
                                     forecast_at_onset=1.0, detail="=cmd|' /C calc'!A0"))
        store.stage_event(AlarmEvent("+SUM(A1)", "spike", "warning", T0, None, value_at_onset=2.0, detail="@x"))
        store.flush()
        (first,) = [s for s in store.events() if s.event.feed_id == feed]
        store.add_note(first.id, "ack", "@x", "ack\u202eby night")
    return db, feed


def test_events_table_and_status_show_escapes_and_the_store_keeps_the_raw_id(hostile_store, capsys):
    db, feed = hostile_store
    assert main(["events", "--each-event", "--db", str(db), "--since", "2026-05-01"]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\u202e" not in out
    assert "pump\\x1b[31m7" in out
    assert main(["status", "--db", str(db)]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "pump\\x1b[31m7" in out
    with open_store(str(db)) as store:
        assert {s.event.feed_id for s in store.events()} == {feed, "+SUM(A1)"}  # never altered


def test_csv_export_defuses_formula_cells_and_keeps_negative_numbers(hostile_store, tmp_path, capsys):
    db, feed = hostile_store
    out_path = tmp_path / "week.csv"
    assert main(["export", "--db", str(db), "--since", "2026-05-01", "--format", "csv", "--out", str(out_path)]) == 0
    assert stat.S_IMODE(os.stat(out_path).st_mode) == 0o600
    rows = list(csv.DictReader(line for line in out_path.read_text(encoding="utf-8").splitlines(keepends=True)
                               if not line.startswith("#")))
    by_feed = {r["feed_id"]: r for r in rows}
    assert set(by_feed) == {feed, "'+SUM(A1)"}
    hostile = by_feed[feed]
    assert hostile["detail"] == "'=cmd|' /C calc'!A0"
    assert hostile["acknowledged_by"] == "'@x"
    assert hostile["value_at_onset"] == "-3.5"  # a numeric cell stays a number
    assert by_feed["'+SUM(A1)"]["detail"] == "'@x"


# ------------------------------------------------------------------------------ logs
def _record(msg: str, *args, level=logging.WARNING) -> logging.LogRecord:
    return logging.LogRecord("leadline.test", level, __file__, 1, msg, args, None)


def test_text_formatter_escapes_message_and_args():
    line = SafeTextFormatter().format(_record("reject at %s: %s", f"plant/{RED}x\nFAKE LINE", "bad"))
    assert "\n" not in line and "\x1b" not in line
    assert line.endswith("WARNING leadline.test reject at plant/\\x1b[31mx\\x0aFAKE LINE: bad")


def test_journal_prefix_and_json_lines():
    # sd-daemon(3): "<3>" err, "<4>" warning, "<6>" info, "<7>" debug
    assert [syslog_priority(level) for level in (logging.CRITICAL, logging.ERROR, logging.WARNING, logging.INFO,
                                                 logging.DEBUG)] == [2, 3, 4, 6, 7]
    assert SafeTextFormatter(journal=True).format(_record("store down")) == "<4>WARNING leadline.test store down"
    line = JsonLineFormatter(journal=True).format(_record("feed %s", RED, level=logging.ERROR))
    assert line.startswith("<3>{")
    document = json.loads(line[3:])
    assert document["message"] == "feed \\x1b[31m" and document["priority"] == 3 and document["level"] == "error"


def test_configure_logging_detects_the_journal_stream(tmp_path, monkeypatch):
    path = tmp_path / "journal"
    with path.open("w") as stream:
        st = os.fstat(stream.fileno())
        monkeypatch.setenv("JOURNAL_STREAM", f"{st.st_dev}:{st.st_ino}")
        root_level = logging.getLogger().level
        handler = configure_logging("debug", "text", stream)
        try:
            logging.getLogger("leadline.test").debug("checked %s", "\x1b[2J")
            handler.flush()
        finally:
            logging.getLogger().removeHandler(handler)
            logging.getLogger().setLevel(root_level)
    assert path.read_text() == "<7>DEBUG leadline.test checked \\x1b[2J\n"
