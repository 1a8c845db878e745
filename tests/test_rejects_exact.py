"""Reject counts are exact per source and reason, apart from the capped samples; logs summarise.

The store test runs on a real SQLite file; the service test follows a real CSV file through the
real engine and store. Counts are checked against the number of bad rows written.
"""

from __future__ import annotations

import logging
import threading
from collections import Counter
from datetime import datetime, timedelta, timezone

from engine_helpers import settings
from leadline.adapters.service.reject_summary import RejectSummary, stage_source_rejects
from leadline.adapters.service import Service
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.sources.rejects import RejectLog
from leadline.adapters.store.eventstore import open_store
from leadline.adapters.store.writer import REJECT_SAMPLE_LIMIT
from leadline.detector.engine import Engine
from leadline.detector.errors import RejectError

UTC = timezone.utc
T0 = datetime(2026, 6, 1, tzinfo=UTC)


def test_reject_log_deltas_hold_every_reject_exactly_once_across_threads():
    log = RejectLog("meters", max_samples_per_reason=3)
    taken: list = []

    def add(reason: str, n: int) -> None:
        for i in range(n):
            log.add(RejectError(reason, f"row {i}", f"a.csv:{i}"))

    threads = [threading.Thread(target=add, args=(r, 5000)) for r in ("bad_time", "non_numeric", "bad_time")]
    for thread in threads:
        thread.start()
    while any(t.is_alive() for t in threads):
        taken.extend(log.take_counts())
    for thread in threads:
        thread.join()
    taken.extend(log.take_counts())
    total = Counter()
    for delta in taken:
        total[delta.reason] += delta.count
        assert delta.first_seen <= delta.last_seen and delta.source == "meters"
    assert total == {"bad_time": 10000, "non_numeric": 5000} == log.counts()
    assert log.take_counts() == []
    assert len(log.take()) <= 2 * 3  # the samples stay capped per reason


def test_store_adds_deltas_exactly_and_keeps_samples_capped(tmp_path):
    with open_store(str(tmp_path / "r.db")) as store:
        log = RejectLog("scada")
        for flush in range(3):
            for i in range(1000):
                log.add(RejectError("non_numeric", "got 'high'", f"s.csv:{flush * 1000 + i + 1}", b"x,high"))
            for i in range(7):
                log.add(RejectError("bad_time", "31.02.", f"s.csv:{i}"))

            class Source:
                take_rejects = log.take
                take_reject_counts = log.take_counts

            stage_source_rejects(store, Source())
            store.flush()
        counts = {(c.source, c.reason): c.count for c in store.reject_counts()}
        assert counts == {("scada", "non_numeric"): 3000, ("scada", "bad_time"): 21}
        assert len(store.reject_samples("scada", "non_numeric")) == REJECT_SAMPLE_LIMIT
        assert len(store.reject_samples("scada", "bad_time")) == REJECT_SAMPLE_LIMIT


def test_reject_summary_logs_one_line_per_source_and_reason_per_interval(caplog):
    now = [0.0]
    summary = RejectSummary(60.0, clock=lambda: now[0])
    with caplog.at_level(logging.WARNING, logger="leadline.rejects"):
        for second in range(0, 180):
            now[0] = float(second)
            summary.note("mqtt-main", "not_json", 100)
            summary.note("csv-main", "bad_time", 1)
            summary.tick()
        summary.flush()
    lines = [r.getMessage() for r in caplog.records]
    by_key = Counter((line.split()[1], line.split()[2]) for line in lines)
    # seconds 0, 60, 120 and the final flush: 4 lines per key for 180 s, not 180
    assert by_key == {("source=mqtt-main", "reason=not_json"): 4, ("source=csv-main", "reason=bad_time"): 4}
    totals = [line for line in lines if "not_json" in line]
    assert sum(int(line.split("count=")[1].split()[0]) for line in totals) == 180 * 100
    assert totals[-1].endswith("total=18000")


def test_service_stores_exact_counts_for_thousands_of_rejects_in_one_poll(tmp_path, caplog):
    path = tmp_path / "flow.csv"
    lines = ["timestamp,feed,value"]
    expected = Counter()
    for i in range(6000):
        stamp = (T0 + timedelta(minutes=15 * i)).isoformat()
        if i % 3 == 0:
            lines.append(f"{stamp},millbrook/flow,{40 + (i % 7) * 0.1}")
        elif i % 3 == 1:
            lines.append(f"{stamp},millbrook/flow,high")
            expected["non_numeric"] += 1
        else:
            lines.append("31.02.2026,millbrook/flow,1.0")
            expected["bad_time"] += 1
    path.write_text("\n".join(lines) + "\n")
    store = open_store(str(tmp_path / "s.db"))
    follower = CsvFollower("scada", str(path), CsvLayout(), from_start=True)
    service = Service(engine=Engine(lambda feed: settings()), store=store, sources=[follower], refit_workers=0,
                      batch_size=100_000)
    with caplog.at_level(logging.DEBUG):
        assert service.run(until_idle=lambda: True) == 0
    counts = {c.reason: c.count for c in store.reject_counts()}
    assert counts == expected  # 2000 each, from one poll of 6000 rows, not 20
    assert service.rejects_total == sum(expected.values())
    for reason in expected:
        assert len(store.reject_samples("scada", reason)) == REJECT_SAMPLE_LIMIT
    warnings = [r.getMessage() for r in caplog.records if r.name == "leadline.rejects"]
    assert len(warnings) <= 2 * len(expected)  # at once, then at shutdown: never one per reject
    per_reject = [r for r in caplog.records if r.name == "leadline.sources.rejects"]
    assert per_reject and all(r.levelno == logging.DEBUG for r in per_reject)
    store.close()
