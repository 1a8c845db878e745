"""``leadline tune``: the settings grid, the labels file, the scores checked against the detection benchmark."""

from __future__ import annotations

import csv
import numpy as np
import pytest

from leadline.detector.rules import registry
from leadline.adapters.cli import main
from leadline.adapters.config.file import load_config
from leadline.adapters.replay.labels import read_labels
from leadline.adapters.replay.scoring import first_start_within, score_events
from leadline.adapters.replay.session import history_for, replay_settings, run_replay
from leadline.adapters.replay.summary import final_events
from leadline.adapters.replay.tune_grid import combinations, parse_settings
from leadline.detector.engine import FeedSettings
from leadline.detector.errors import ConfigError
from replay_site import FEEDS, SHIFT_AT, SPIKE_AT, START, STEP, write_site


def test_every_combination_in_order():
    settings = combinations(parse_settings(["false_alarms_per_week=0.1,0.2,1", "rules=-ewma", "on_delay=1,2"]))
    assert [s.label for s in settings][:2] == ["false_alarms_per_week=0.1 rules=-ewma on_delay=1",
                                              "false_alarms_per_week=0.1 rules=-ewma on_delay=2"]
    assert len(settings) == 6
    applied = settings[1].apply(FeedSettings())
    assert applied.false_alarms_per_week == 0.1
    assert "ewma" not in applied.monitor.rules and "spike" in applied.monitor.rules
    assert applied.monitor.lifecycles["spike"].on_delay_k == 2
    # the rule's own off-delay is kept
    assert applied.monitor.lifecycles["cusum"].off_delay_steps == registry.entry("cusum").lifecycle.off_delay_steps


@pytest.mark.parametrize("option, words", [("budget=1", "NAME one of"), ("on_delay=0", "whole number"),
                                           ("rules=-nosuchrule", r"\+rule or -rule")])
def test_bad_settings_are_named(option, words):
    with pytest.raises(ConfigError, match=words):
        parse_settings([option])


def test_labels_file_errors_name_the_line(tmp_path):
    path = tmp_path / "labels.csv"
    path.write_text("feed,start,end,kind,note\nq/a,2026-04-06T00:00:00+00:00,2026-04-06T01:00:00Z,spike,\n"
                    "q/a,2026-04-06T00:00:00,2026-04-06T01:00:00Z,spike,\n")
    with pytest.raises(ConfigError, match=r"labels.csv:3: start: .* has no UTC offset"):
        read_labels(path)
    path.write_text("feed,when,kind\n")
    with pytest.raises(ConfigError, match=r"labels.csv:1: expected the header feed,start,end,kind,note"):
        read_labels(path)


def test_first_start_within_is_half_open_unless_inclusive():
    starts = np.array([3.0, 10.0, 12.0])
    assert first_start_within(starts, 4, 10) is None
    assert first_start_within(starts, 4, 10, inclusive=True) == 10.0
    assert first_start_within(starts, 0, 100) == 3.0


@pytest.fixture(scope="module")
def replayed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("quillmoor-tune")
    config_path = write_site(folder)
    config = load_config(config_path)
    history = history_for(config)
    run = run_replay(history, replay_settings(config, list(history.feeds)))
    return folder, config_path, run


def test_recall_and_false_alarms_agree_with_the_benchmark_rule(replayed):
    """The detection benchmark's computation on reading indexes gives the same recall and false alarms."""
    folder, _, run = replayed
    labels = read_labels(folder / "labels.csv")
    grace_slots = 8
    events = list(final_events(run.events).values())
    end = START + 700 * STEP
    score = score_events(events, labels, grace_s=grace_slots * STEP.total_seconds(), history_end=end)
    # bench_detection.py: starts as reading indexes, a fault found when a start is in [onset, onset + window);
    # false alarms: starts on clean readings, before the first fault of the feed.
    found, false_alarms = [], 0
    for feed in FEEDS:
        starts = np.array([(e.start - START) / STEP for e in events if e.feed_id == feed])
        for onset, length in ((SPIKE_AT[feed], 0), (SHIFT_AT[feed], 8)):
            found.append(first_start_within(starts, onset, onset + length + grace_slots + 1) is not None)
        false_alarms += int(np.sum(starts < SPIKE_AT[feed]))
    assert score.recall() == sum(found) / len(found)
    before_first = sum(1 for e in events if e.start < START + SPIKE_AT[e.feed_id] * STEP)
    assert false_alarms == before_first
    assert score.false_alarms >= before_first  # the ones between faults come on top
    assert score.recall("spike") == 1.0  # 20-sigma wild readings: found by any detector worth the name


def test_tune_prints_a_row_per_setting_and_writes_the_csv(replayed, capsys):
    folder, config_path, run = replayed
    out_csv = folder / "tune.csv"
    assert main(["tune", "--config", str(config_path), "--setting", "off_delay=1,12",
                 "--labels", str(folder / "labels.csv"), "--csv", str(out_csv)]) == 0
    printed = capsys.readouterr().out
    assert "off_delay=1 " in printed and "off_delay=12 " in printed
    with out_csv.open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert [r["setting"] for r in rows] == ["off_delay=1", "off_delay=12"]
    assert {"alarms_per_feed_week", "alarms_per_shift", "recall", "precision", "recall spike",
            "median delay s level shift"} <= set(rows[0])
    # Alarms per shift: the site's alarms over the 8-hour shifts of reading time the history spans.
    for row in rows:
        span_s = (699 * STEP).total_seconds()
        assert float(row["alarms_per_shift"]) == pytest.approx(int(row["alarms"]) / (span_s / (8 * 3600)))


def test_the_report_plots_alarm_load_against_recall(replayed, capsys):
    pytest.importorskip("matplotlib")
    folder, config_path, _ = replayed
    out_csv = folder / "tune-report.csv"
    assert main(["tune", "--config", str(config_path), "--setting", "on_delay=1,2",
                 "--labels", str(folder / "labels.csv"), "--csv", str(out_csv)]) == 0
    assert main(["replay", "--config", str(config_path)]) == 0
    page = folder / "report.html"
    assert main(["report", "--db", str(folder / "replay.db"), "--since", START.isoformat(),
                 "--until", (START + 700 * STEP).isoformat(), "--tune", str(out_csv), "--out", str(page)]) == 0
    html = page.read_text()
    section = html[html.index('<section id="tune">'):]
    assert "on_delay=1" in section and "on_delay=2" in section
    assert 'aria-label="Alarm load against recall, one point per setting"' in section
    capsys.readouterr()


def test_a_tune_csv_without_its_columns_is_refused(tmp_path):
    from leadline.adapters.report.tune_section import read_tune_csv

    path = tmp_path / "t.csv"
    path.write_text("setting,recall\nx,1\n")
    with pytest.raises(ConfigError, match=r"t.csv:1: not a leadline tune CSV \(missing alarms_per_feed_week"):
        read_tune_csv(path)
