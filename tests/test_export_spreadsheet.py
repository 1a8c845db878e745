"""``leadline export`` opens cleanly in a spreadsheet: CSV in UTF-8 (optional byte order mark), no
trailer line, ISO 8601 times with offset; xlsx with real date cells, a frozen header row and the
caution on its own sheet.

The CSV is read back with Python's csv module (RFC 4180 rows); the workbook with openpyxl, an
independent reader of ECMA-376 (Office Open XML) files, whose cell types are checked.
"""

from __future__ import annotations

import csv
import io
from datetime import datetime, timedelta, timezone

import pytest

from leadline.adapters.cli import main, review
from leadline.adapters.cli.formats import CSV_COLUMNS
from leadline.adapters.store.eventstore import open_store
from leadline.detector.events import CAUTION, AlarmEvent

openpyxl = pytest.importorskip("openpyxl")
pytest.importorskip("xlsxwriter")

UTC = timezone.utc
NOW = datetime(2026, 10, 20, 9, 0, tzinfo=UTC)
FEED = "fenwick/north/flow"
FORMULA = "=HYPERLINK(\"http://example.invalid\",\"x\")"


@pytest.fixture
def run(tmp_path, monkeypatch):
    db = tmp_path / "events.db"
    with open_store(str(db)) as store:
        store.stage_event(AlarmEvent(FEED, "spike", "alarm", NOW - timedelta(hours=2), NOW - timedelta(hours=1),
                                     peak_abs_z=7.25, value_at_onset=-3.5, forecast_at_onset=12.0,
                                     detail=FORMULA))
        store.stage_event(AlarmEvent(FEED, "cusum", "warning", NOW - timedelta(minutes=30), None,
                                     detail="Durchfluss gestiegen: 12,5 m³/h"))
        store.flush()
        first = store.events()[0].id
        store.add_note(first, "ack", "Zoë Ångström", "checked", at=NOW - timedelta(minutes=50))
    monkeypatch.setattr(review, "utc_now", lambda: NOW)
    return lambda *argv: main([*argv, "--db", f"sqlite:///{db}"])


def test_csv_has_no_trailer_iso_times_and_an_optional_bom(run, tmp_path, capsys):
    plain, marked = tmp_path / "plain.csv", tmp_path / "bom.csv"
    assert run("export", "--since", "12h", "--out", str(plain)) == 0
    assert run("export", "--since", "12h", "--bom", "--out", str(marked)) == 0
    assert "2 events written to" in capsys.readouterr().err
    raw = plain.read_bytes()
    assert not raw.startswith(b"\xef\xbb\xbf") and marked.read_bytes() == b"\xef\xbb\xbf" + raw
    text = raw.decode("utf-8")  # strict UTF-8
    rows = list(csv.reader(io.StringIO(text)))
    assert tuple(rows[0]) == CSV_COLUMNS and rows[0][-1] == "caution"
    assert len(rows) == 3 and all(len(r) == len(CSV_COLUMNS) for r in rows)  # no trailer row
    assert not any(line.startswith("#") for line in text.splitlines())
    for r in rows[1:]:
        record = dict(zip(CSV_COLUMNS, r))
        assert record["caution"] == CAUTION
        start = datetime.fromisoformat(record["start"])
        assert start.utcoffset() == timedelta(0) and record["start"].endswith("+00:00")
    spike = dict(zip(CSV_COLUMNS, rows[1]))
    assert spike["detail"] == "'" + FORMULA  # a text cell is never run as a formula
    assert spike["value_at_onset"] == "-3.5"  # numbers stay numbers
    assert spike["acknowledged_by"] == "Zoë Ångström"
    assert run("export", "--since", "12h", "--format", "json", "--bom") == 2
    assert "--bom is for --format csv" in capsys.readouterr().err


def test_xlsx_has_date_cells_a_frozen_header_and_the_caution_sheet(run, tmp_path, capsys):
    assert run("export", "--since", "12h", "--format", "xlsx") == 2
    assert "--format xlsx needs --out FILE" in capsys.readouterr().err
    path = tmp_path / "events.xlsx"
    assert run("export", "--since", "12h", "--format", "xlsx", "--out", str(path)) == 0
    book = openpyxl.load_workbook(path)
    assert book.sheetnames == ["Events", "Caution"]
    sheet = book["Events"]
    assert sheet.freeze_panes == "A2"
    header = [c.value for c in sheet[1]]
    assert header[:7] == ["id", "feed_id", "rule", "severity", "state", "start (UTC)", "end (UTC)"]
    assert "caution" not in header
    col = {h: i for i, h in enumerate(header)}
    spike, cusum = list(sheet.iter_rows(min_row=2, values_only=False))
    start = spike[col["start (UTC)"]]
    assert start.is_date and start.value == datetime(2026, 10, 20, 7, 0)  # UTC, as the header says
    assert cusum[col["end (UTC)"]].value is None  # still active
    assert spike[col["peak_abs_z"]].data_type == "n" and spike[col["peak_abs_z"]].value == 7.25
    assert spike[col["value_at_onset"]].value == -3.5
    assert spike[col["detail"]].data_type == "s" and spike[col["detail"]].value == FORMULA  # text, not a formula
    assert spike[col["acknowledged_at (UTC)"]].is_date
    assert cusum[col["detail"]].value == "Durchfluss gestiegen: 12,5 m³/h"
    assert book["Caution"]["A1"].value == CAUTION
