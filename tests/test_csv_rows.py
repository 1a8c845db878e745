"""The CSV row parser: layouts, header mapping, delimiters, times, rejects."""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from leadline.adapters.sources.csv_rows import CsvLayout, RowParser
from leadline.detector.errors import ConfigError, RejectError

UTC = timezone.utc


def parse(layout: CsvLayout, header: bytes | None, *rows: bytes):
    parser = RowParser.from_header_line(layout, header, "meters.csv")
    out = []
    for number, row in enumerate(rows, start=2):
        parser.parse_into(row, number, ("origin", number), out)
    return parser, out


def test_long_layout_with_offset_times():
    _, out = parse(CsvLayout(), b"timestamp,feed,value", b"2024-05-01T06:15:00+02:00,northgate/flow,12.5")
    (reading,) = out
    assert reading.feed_id == "northgate/flow" and reading.value == 12.5
    assert reading.timestamp == datetime(2024, 5, 1, 4, 15, tzinfo=UTC)
    assert reading.origin == ("origin", 2)


def test_header_mapping_delimiter_and_decimal_comma():
    layout = CsvLayout(delimiter=";", decimal=",", time_column="Zeit", feed_column="Messstelle", value_column="Wert")
    _, out = parse(layout, b"Wert;Zeit;Messstelle", b"1234,5;2024-05-01T00:00:00Z;DM 7")
    assert [(r.feed_id, r.value) for r in out] == [("DM 7", 1234.5)]


def test_wide_layout_all_columns_and_prefix():
    layout = CsvLayout(layout="wide", feed_prefix="eastfield/")
    _, out = parse(layout, b"timestamp,flow,pressure", b"2024-05-01T00:00:00Z,1.5,3.25")
    assert [(r.feed_id, r.value) for r in out] == [("eastfield/flow", 1.5), ("eastfield/pressure", 3.25)]


def test_wide_layout_mapped_columns_and_bad_cell_rejects_only_that_cell():
    layout = CsvLayout(layout="wide", time_column="t", feed_columns={"Q1": "pump-1/flow", "Q2": "pump-2/flow"})
    parser, out = parse(layout, b"t,Q1,note,Q2", b"2024-05-01T00:00:00Z,oops,text,2.0")
    assert [(r.feed_id, r.value) for r in out] == [("pump-2/flow", 2.0)]
    (reject,) = parser.cell_rejects
    assert reject.reason == "non_numeric" and reject.where == "meters.csv:2"
    assert "'Q1'" in reject.detail


def test_no_header_uses_column_names():
    layout = CsvLayout(has_header=False, column_names=("feed", "timestamp", "value"))
    _, out = parse(layout, None, b"a,1970-01-01T00:00:10Z,4")
    assert out[0].timestamp == datetime(1970, 1, 1, 0, 0, 10, tzinfo=UTC)


@pytest.mark.parametrize(
    ("time_format", "cell", "expected"),
    [
        ("epoch_s", b"1714536900", datetime(2024, 5, 1, 4, 15, tzinfo=UTC)),
        ("epoch_s", b"1714536900.25", datetime(2024, 5, 1, 4, 15, 0, 250000, tzinfo=UTC)),
        ("epoch_ms", b"1714536900123", datetime(2024, 5, 1, 4, 15, 0, 123000, tzinfo=UTC)),
        ("iso8601", b"2024-05-01T04:15:00Z", datetime(2024, 5, 1, 4, 15, tzinfo=UTC)),
        ("iso8601", b"2024-05-01 06:15:00.5+02:00", datetime(2024, 5, 1, 4, 15, 0, 500000, tzinfo=UTC)),
        ("%d.%m.%Y %H:%M%z", b"01.05.2024 06:15+0200", datetime(2024, 5, 1, 4, 15, tzinfo=UTC)),
    ],
)
def test_time_formats(time_format, cell, expected):
    _, out = parse(CsvLayout(time_format=time_format), b"timestamp,feed,value", cell + b",f,1")
    assert out[0].timestamp == expected


def test_named_zone_converts_local_time_to_utc():
    layout = CsvLayout(time_zone="Europe/Berlin", time_format="%d.%m.%Y %H:%M", delimiter=";", decimal=",")
    # Winter (CET, UTC+1) and summer (CEST, UTC+2); tz database rules (Europe/Berlin).
    _, out = parse(layout, b"timestamp;feed;value", b"15.01.2024 12:00;a;1,0", b"15.07.2024 12:00;a;2,0")
    assert [r.timestamp for r in out] == [datetime(2024, 1, 15, 11, tzinfo=UTC), datetime(2024, 7, 15, 10, tzinfo=UTC)]


def test_named_zone_dst_gap_rejected_and_overlap_resolved_in_order():
    # EU rule: clocks go 02:00 -> 03:00 on 2024-03-31 and 03:00 -> 02:00 on 2024-10-27.
    layout = CsvLayout(time_zone="Europe/Berlin")
    with pytest.raises(RejectError, match="daylight-saving gap"):
        parse(layout, b"timestamp,feed,value", b"2024-03-31T02:30:00,a,1")
    rows = [f"2024-10-27T{t},a,{i}".encode() for i, t in enumerate(["01:45:00", "02:15:00", "02:45:00", "02:15:00", "02:45:00", "03:15:00"])]
    _, out = parse(layout, b"timestamp,feed,value", *rows)
    utc = [r.timestamp for r in out]
    assert utc == [datetime(2024, 10, 26, 23, 45, tzinfo=UTC) + timedelta(minutes=30 * k) for k in range(6)]


@pytest.mark.parametrize(
    ("row", "reason", "message"),
    [
        (b"2024-05-01T00:00:00Z,a", "wrong_columns", "expected 3 columns"),
        (b"2024-05-01T00:00:00Z,a,1,2", "wrong_columns", "expected 3 columns"),
        (b"yesterday,a,1", "bad_time", "ISO 8601"),
        (b"2024-05-01T00:00:00,a,1", "bad_time", "no UTC offset"),
        (b",a,1", "bad_time", "empty time"),
        (b"2024-05-01T00:00:00Z,a,abc", "non_numeric", "expected a number"),
        (b"2024-05-01T00:00:00Z,a,1_000", "non_numeric", "number without _"),
        (b"2024-05-01T00:00:00Z,a,NaN", "not_finite", "finite number"),
        (b"2024-05-01T00:00:00Z,a,-inf", "not_finite", "finite number"),
        (b"2024-05-01T00:00:00Z, ,1", "bad_feed", "empty feed id"),
        (b"2024-05-01T00:00:00Z,\xff,1", "bad_encoding", "not UTF-8"),
    ],
)
def test_rejects_name_file_line_reason_and_expectation(row, reason, message):
    with pytest.raises(RejectError, match=message) as info:
        parse(CsvLayout(), b"timestamp,feed,value", row)
    assert info.value.reason == reason
    assert info.value.where == "meters.csv:2"
    assert info.value.raw == row


def test_empty_value_is_missing_not_rejected():
    parser, out = parse(CsvLayout(), b"timestamp,feed,value", b"2024-05-01T00:00:00Z,a,", b"2024-05-01T00:01:00Z,a, ")
    assert len(out) == 2 and all(math.isnan(r.value) and r.is_missing for r in out)
    assert parser.missing == 2


def test_quoted_cells_go_through_the_csv_module():
    _, out = parse(CsvLayout(), b"timestamp,feed,value", b'"2024-05-01T00:00:00Z","plant ""A"", inlet","7.5"')
    assert [(r.feed_id, r.value) for r in out] == [('plant "A", inlet', 7.5)]


def test_bad_header_and_config():
    with pytest.raises(RejectError, match="'feed' is not a column") as info:
        RowParser.from_header_line(CsvLayout(), b"timestamp,meter,value", "x.csv")
    assert info.value.reason == "bad_header" and info.value.where == "x.csv:1"
    with pytest.raises(RejectError, match="duplicate"):
        RowParser.from_header_line(CsvLayout(), b"timestamp,feed,value,feed", "x.csv")
    with pytest.raises(ConfigError, match="equals the delimiter"):
        CsvLayout(decimal=",")
    with pytest.raises(ConfigError, match="unknown time zone"):
        CsvLayout(time_zone="Mars/Olympus")
    with pytest.raises(ConfigError, match="unknown key"):
        CsvLayout.from_mapping({"layout": "long", "seperator": ";"})


def test_header_with_bom_and_crlf():
    parser = RowParser.from_header_line(CsvLayout(), b"\xef\xbb\xbftimestamp,feed,value\r", "x.csv")
    assert parser.header == ["timestamp", "feed", "value"]


layouts = [
    CsvLayout(),
    CsvLayout(layout="wide", delimiter=";", decimal=","),
    CsvLayout(time_format="epoch_ms", time_zone="Europe/Berlin"),
    CsvLayout(time_format="%d.%m.%Y %H:%M", time_zone="America/New_York"),
]


@settings(max_examples=400, deadline=None, derandomize=True)
@given(st.binary(max_size=120), st.sampled_from(range(len(layouts))))
def test_fuzz_random_rows_raise_only_reject_errors(row, which):
    layout = layouts[which]
    header = b"timestamp,feed,value" if layout.layout == "long" else b"timestamp;a;b"
    parser = RowParser.from_header_line(layout, header, "fuzz.csv")
    out: list = []
    try:
        parser.parse_into(row, 2, None, out)
    except RejectError as exc:
        assert exc.where == "fuzz.csv:2"
    for reading in out:
        assert reading.timestamp.tzinfo is not None
        assert math.isnan(reading.value) or math.isfinite(reading.value)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(st.binary(max_size=80))
def test_fuzz_random_headers_raise_only_reject_errors(header):
    try:
        RowParser.from_header_line(CsvLayout(), header, "fuzz.csv")
    except RejectError:
        pass
