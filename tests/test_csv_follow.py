"""The CSV follower: every case checked for exactly-once output.

A small stand-in for the service loop commits each poll's readings together
with the follower's durable marks (as the store will, in one transaction),
and a "crash" simply drops the follower with whatever it polled but did not
commit. A fresh follower then starts from the committed marks.
"""

from __future__ import annotations

import os
import shutil
from collections import Counter
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from leadline.adapters.ports import Source
from leadline.adapters.sources.csv_follow import CsvFollower, CsvOrigin
from leadline.adapters.sources.csv_rows import CsvLayout

UTC = timezone.utc
T0 = datetime(2024, 5, 1, tzinfo=UTC)
HEADER = "timestamp,feed,value\n"


def row(i: int, feed: str = "northgate/flow") -> str:
    return f"{(T0 + timedelta(minutes=i)).isoformat()},{feed},{i}\n"


def key(i: int, feed: str = "northgate/flow") -> tuple[str, datetime, float]:
    return (feed, T0 + timedelta(minutes=i), float(i))


class Committed:
    """What the store would hold: readings and marks, committed together."""

    def __init__(self) -> None:
        self.readings: list[tuple[str, datetime, float]] = []
        self.marks: dict = {}

    def cycle(self, follower: CsvFollower, max_items: int = 1000, timeout_s: float = 0.0) -> int:
        readings = follower.poll(max_items, timeout_s)
        marks = follower.durable_marks(readings)
        self.readings.extend((r.feed_id, r.timestamp, r.value) for r in readings)
        for mark in marks:
            self.marks[mark.path] = mark
        follower.ack(readings)
        return len(readings)

    def drain(self, follower: CsvFollower, cycles: int = 50, max_items: int = 1000) -> None:
        for _ in range(cycles):
            self.cycle(follower, max_items)

    def assert_exactly(self, expected: list[tuple[str, datetime, float]]) -> None:
        counts = Counter(self.readings)
        repeated = [k for k, n in counts.items() if n > 1]
        assert not repeated, f"read twice: {repeated[:3]}"
        missing = set(expected) - set(counts)
        assert not missing, f"never read: {sorted(missing)[:3]}"
        assert set(counts) == set(expected)


def follower(pattern, **kwargs) -> CsvFollower:
    kwargs.setdefault("rotate_grace_s", 0.0)
    kwargs.setdefault("rescan_interval_s", 0.0)
    f = CsvFollower("meters", str(pattern), kwargs.pop("layout", CsvLayout()), **kwargs)
    f.start()
    return f


def append(path: Path, text: str) -> None:
    with open(path, "a", encoding="utf-8") as handle:
        handle.write(text)


def test_follower_is_a_source(tmp_path):
    assert isinstance(follower(tmp_path / "x.csv"), Source)


def test_partial_last_line_is_buffered_until_its_newline(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + row(0) + row(1)[:15])
    f = follower(path, from_start=True)
    store = Committed()
    store.drain(f, 3)
    assert store.readings == [key(0)]
    assert store.marks[str(path)].offset_bytes == len(HEADER + row(0))  # a line end, not mid-line
    append(path, row(1)[15:] + row(2))
    store.drain(f, 3)
    store.assert_exactly([key(0), key(1), key(2)])


def test_restart_mid_file_resumes_from_committed_marks(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + "".join(row(i) for i in range(100)))
    store = Committed()
    first = follower(path, from_start=True)
    for _ in range(3):
        store.cycle(first, max_items=10)
    first.poll(10, 0)  # polled, never committed: the crash loses these
    del first
    assert len(store.readings) == 30
    second = follower(path, start_offsets=store.marks)
    append(path, "".join(row(i) for i in range(100, 120)))
    store.drain(second, 20, max_items=7)
    store.assert_exactly([key(i) for i in range(120)])


def test_restart_keeps_line_numbers_and_header(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + row(0) + row(1))
    store = Committed()
    store.drain(follower(path, from_start=True), 2)
    append(path, "2024-05-01T00:09:00Z,northgate/flow,oops\n")
    again = follower(path, start_offsets=store.marks)
    store.drain(again, 2)
    (sample,) = again.take_rejects()
    assert sample.where == f"{path}:4" and sample.reason == "non_numeric"


def test_rotation_by_rename_finishes_the_old_file_first(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + "".join(row(i) for i in range(10)))
    f = follower(path, from_start=True)
    store = Committed()
    store.drain(f, 2)
    os.rename(path, tmp_path / "flow.csv.1")
    append(tmp_path / "flow.csv.1", row(10) + row(11))  # the writer still had the old file open
    path.write_text(HEADER + row(12) + row(13))
    store.drain(f, 5)
    append(path, row(14))
    store.drain(f, 3)
    store.assert_exactly([key(i) for i in range(15)])
    assert [r[2] for r in store.readings] == [float(i) for i in range(15)]  # old file's rows first
    assert store.marks[str(path)].inode == os.stat(path).st_ino


def test_rotation_while_stopped_finishes_the_renamed_file(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + "".join(row(i) for i in range(5)))
    store = Committed()
    store.drain(follower(path, from_start=True), 2)
    append(path, row(5))
    os.rename(path, tmp_path / "flow.csv.1")
    path.write_text(HEADER + row(6))
    f = follower(path, start_offsets=store.marks)
    store.drain(f, 5)
    store.assert_exactly([key(i) for i in range(7)])


def test_copytruncate_reads_again_from_zero(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + "".join(row(i) for i in range(20)))
    f = follower(path, from_start=True)
    store = Committed()
    store.drain(f, 2)
    shutil.copy(path, tmp_path / "flow.csv.1")
    with open(path, "r+") as handle:
        handle.truncate(0)
    store.drain(f, 2)
    append(path, HEADER + row(20) + row(21))
    store.drain(f, 3)
    store.assert_exactly([key(i) for i in range(22)])
    mark = store.marks[str(path)]
    assert mark.offset_bytes == len(HEADER + row(20) + row(21))
    # A restart after the truncation resumes in the new content, not before it.
    append(path, row(22))
    store.drain(follower(path, start_offsets=store.marks), 2)
    store.assert_exactly([key(i) for i in range(23)])


def test_truncation_within_one_poll_marks_the_new_content(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + row(0) + row(1))
    f = follower(path, from_start=True)
    readings = f.poll(1000, 0)
    with open(path, "w") as handle:
        handle.write(HEADER + row(2))
    readings += f.poll(1000, 0) + f.poll(1000, 0)
    marks = f.durable_marks(readings)
    assert [r.value for r in readings] == [0.0, 1.0, 2.0]
    (mark,) = marks
    assert mark.offset_bytes == len(HEADER + row(2))


def test_glob_rolls_over_to_the_next_days_file(tmp_path):
    day1 = tmp_path / "flow-2024-05-01.csv"
    day1.write_text(HEADER + "".join(row(i) for i in range(5)))
    f = follower(tmp_path / "flow-*.csv", from_start=True)
    store = Committed()
    store.drain(f, 2)
    append(day1, row(5))
    day2 = tmp_path / "flow-2024-05-02.csv"
    day2.write_text(HEADER + row(6) + row(7))
    store.drain(f, 3)
    store.assert_exactly([key(i) for i in range(8)])
    assert f.followed_paths() == [str(day1), str(day2)]
    # A restart keeps both positions; the day after appears while stopped.
    day3 = tmp_path / "flow-2024-05-03.csv"
    day3.write_text(HEADER + row(8))
    append(day2, row(9))
    store.drain(follower(tmp_path / "flow-*.csv", start_offsets=store.marks), 3)
    store.assert_exactly([key(i) for i in range(10)])


def test_file_with_five_percent_bad_rows(tmp_path):
    path = tmp_path / "flow.csv"
    lines = [HEADER]
    expected = []
    bad = Counter()
    for i in range(2000):
        if i % 20 == 7:  # 5% of the rows
            kind = (i // 20) % 4
            lines.append(
                [
                    f"{(T0 + timedelta(minutes=i)).isoformat()},northgate/flow,not-a-number\n",
                    f"31/13/2024,northgate/flow,{i}\n",
                    f"{(T0 + timedelta(minutes=i)).isoformat()},northgate/flow\n",
                    f"{(T0 + timedelta(minutes=i)).isoformat()},northgate/flow,inf\n",
                ][kind]
            )
            bad[["non_numeric", "bad_time", "wrong_columns", "not_finite"][kind]] += 1
        elif i % 50 == 3:
            lines.append(f"{(T0 + timedelta(minutes=i)).isoformat()},northgate/flow,\n")
            expected.append(("northgate/flow", T0 + timedelta(minutes=i), None))
        else:
            lines.append(row(i))
            expected.append(key(i))
    path.write_text("".join(lines))
    store = Committed()
    f = follower(path, from_start=True)
    for _ in range(3):
        store.cycle(f, max_items=300)
    second = follower(path, start_offsets=store.marks)
    store.drain(second, 20, max_items=300)
    got = [(feed, ts, None if v != v else v) for feed, ts, v in store.readings]
    assert Counter(got) == Counter(expected)
    # Each bad row counted once by reason, across the restart.
    assert Counter(f.counts()["rejects_by_reason"]) + Counter(second.counts()["rejects_by_reason"]) == bad
    missing = f.counts()["missing"] + second.counts()["missing"]
    assert missing == sum(1 for e in expected if e[2] is None) == 40
    samples = f.take_rejects() + second.take_rejects()
    assert len(samples) <= 4 * 2 * 20  # bounded: 20 per reason per take
    assert all(s.where.startswith(f"{path}:") and s.raw for s in samples)
    lines_of_samples = {int(s.where.rsplit(":", 1)[1]) for s in samples}
    assert all((n - 2) % 20 == 7 for n in lines_of_samples)  # line n holds row n - 2


def test_reject_only_polls_still_move_the_mark(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + row(0) + "bad,row,here\n" + "another bad\n")
    store = Committed()
    f = follower(path, from_start=True)
    store.drain(f, 2)
    assert store.marks[str(path)].offset_bytes == os.path.getsize(path)
    again = follower(path, start_offsets=store.marks)
    store.drain(again, 2)
    assert again.counts()["rejected"] == 0  # not counted twice
    store.assert_exactly([key(0)])


def test_without_from_start_an_existing_file_is_read_from_its_end(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + row(0) + row(1) + row(2)[:10])
    store = Committed()
    f = follower(path)
    store.drain(f, 2)
    assert store.readings == []
    append(path, row(2)[10:] + row(3))
    store.drain(f, 2)
    store.assert_exactly([key(2), key(3)])  # the half line at the start belongs to the new data
    append(path, row(4))
    store.drain(follower(path, start_offsets=store.marks), 2)
    store.assert_exactly([key(i) for i in range(2, 5)])


def test_wide_rows_are_never_split_across_polls(tmp_path):
    path = tmp_path / "wide.csv"
    path.write_text("timestamp,a,b,c\n" + "".join(f"{(T0 + timedelta(minutes=i)).isoformat()},{i},{i},{i}\n" for i in range(10)))
    f = follower(path, from_start=True, layout=CsvLayout(layout="wide"))
    batch = f.poll(4, 0)
    assert len(batch) == 6  # two whole rows, not four readings
    origins = {r.origin for r in batch}
    assert all(isinstance(o, CsvOrigin) for o in origins) and len(origins) == 2


def test_crlf_and_blank_lines(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_bytes((HEADER + row(0) + "\n" + row(1)).replace("\n", "\r\n").encode())
    store = Committed()
    f = follower(path, from_start=True)
    store.drain(f, 2)
    store.assert_exactly([key(0), key(1)])
    assert f.counts()["rejected"] == 0


def test_bad_header_rejects_that_file_only(tmp_path):
    (tmp_path / "a.csv").write_text("time,meter,reading\n2024-05-01T00:00:00Z,x,1\n")
    (tmp_path / "b.csv").write_text(HEADER + row(0))
    f = follower(tmp_path / "*.csv", from_start=True)
    store = Committed()
    store.drain(f, 2)
    store.assert_exactly([key(0)])
    (sample,) = f.take_rejects()
    assert sample.reason == "bad_header" and sample.where == f"{tmp_path / 'a.csv'}:1"


def test_poll_waits_up_to_its_timeout_for_new_lines(tmp_path):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER)
    f = follower(path, from_start=True, poll_interval_s=0.01)
    assert f.poll(10, 0.05) == []


@pytest.mark.parametrize("chunk", [7, 64, 4096])
def test_small_read_chunks_give_the_same_output(tmp_path, chunk):
    path = tmp_path / "flow.csv"
    path.write_text(HEADER + "".join(row(i) for i in range(50)))
    store = Committed()
    store.drain(follower(path, from_start=True, read_chunk_bytes=chunk), 200, max_items=3)
    store.assert_exactly([key(i) for i in range(50)])
    assert store.marks[str(path)].offset_bytes == os.path.getsize(path)


def test_sample_file_wide_decimal_comma_local_time(tmp_path):
    # tests/data/eastfield_pumps_wide.csv: ';' delimiter, decimal comma, CRLF,
    # local times in Europe/Berlin (CEST = UTC+2 in May), mapped columns.
    sample = Path(__file__).parent / "data" / "eastfield_pumps_wide.csv"
    path = tmp_path / sample.name
    shutil.copy(sample, path)
    layout = CsvLayout(
        layout="wide", delimiter=";", decimal=",", time_column="Time",
        time_format="%d.%m.%Y %H:%M", time_zone="Europe/Berlin",
        feed_columns={"Pump 1 flow": "eastfield/pump-1/flow", "Pump 2 flow": "eastfield/pump-2/flow"},
    )
    f = follower(path, from_start=True, layout=layout)
    readings = f.poll(100, 0)
    p1, p2 = "eastfield/pump-1/flow", "eastfield/pump-2/flow"
    at = [datetime(2024, 5, 1, 4, m, tzinfo=UTC) for m in (0, 15, 30, 45)]
    got = [(r.feed_id, r.timestamp, None if r.is_missing else r.value) for r in readings]
    assert got == [
        (p1, at[0], 12.5), (p2, at[0], 8.25),
        (p1, at[1], 12.75), (p2, at[1], None),
        (p2, at[2], 8.5),
        (p1, at[3], 13.0), (p2, at[3], 8.75),
    ]
    assert f.counts()["missing"] == 1
    (sample_reject,) = f.take_rejects()
    assert sample_reject.where == f"{path}:4" and "'Pump 1 flow'" in sample_reject.detail
    (mark,) = f.durable_marks(readings)
    assert mark.offset_bytes == os.path.getsize(path)
