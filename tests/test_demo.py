"""The README's first command, ``leadline demo``, finds every planted fault."""

from __future__ import annotations

import io

import pytest

from leadline.adapters.cli.demo import run_demo
from leadline.adapters.cli.demo_scenario import build_scenario


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    out = io.StringIO()
    result = run_demo(folder, out=out, live_seconds=3.0)
    return folder, out.getvalue(), result


def test_every_planted_fault_is_found_by_its_rule(demo):
    _, text, result = demo
    assert result["readings"] == result["expected"]
    scenario = result["scenario"]
    for index in result["wanted"]:
        fault = scenario.faults[index]
        rules = {e.event.rule for e in result["by_fault"].get(index, [])}
        assert fault.rule in rules, f"{fault.kind} on {fault.feed_id}: expected a {fault.rule} event, got {rules}"
    assert "Planted faults found: 5 of 5" in text


def test_the_rollover_is_no_alarm_and_clean_feeds_stay_quiet(demo):
    _, _, result = demo
    feeds = {e.event.feed_id for e in result["events"]}
    assert "fenwick/bulk-west/volume" not in feeds
    # Few events not explained by a planted fault: under 1 per feed over the 2 live days.
    assert len(result["not_planted"]) < len(build_scenario().feeds)


def test_the_demo_prints_the_table_the_caution_and_next_commands(demo):
    folder, text, _ = demo
    assert "Events (times in Europe/London)" in text
    assert "operator judgment" in text.splitlines()[-1]
    assert f"leadline events --config {folder / 'leadline.toml'}" in text
    assert (folder / "leadline.db").exists()


def test_the_caution_is_printed_once_and_the_rollover_in_words(demo):
    from leadline.detector.events import CAUTION

    _, text, _ = demo
    assert text.count(CAUTION) == 1
    line = next(x for x in text.splitlines() if "register rollover of fenwick/bulk-west/volume" in x)
    assert "1 register rollover (handled, not an alarm)" in line and "{" not in line


@pytest.mark.slow
def test_the_demo_is_never_silent_for_more_than_2_seconds(tmp_path):
    """A check of silence between output lines (common practice for interactive tools: a user
    watching a terminal should see a sign of life every second or two), not of speed."""
    import os
    import subprocess
    import sys
    import time

    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    stamps = []
    with subprocess.Popen([sys.executable, "-m", "leadline.adapters.cli", "demo", "--dir", str(tmp_path / "d"),
                           "--live-seconds", "3"], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                          env=env) as proc:
        assert proc.stdout is not None
        for _ in proc.stdout:
            stamps.append(time.monotonic())
        assert proc.wait(timeout=300) == 0
    gaps = [b - a for a, b in zip(stamps, stamps[1:])]
    assert len(stamps) > 10 and max(gaps) <= 2.0, max(gaps)


def test_the_readme_review_examples_point_at_the_demo_data():
    """Every date in the README's review commands lies in the demo's live days, where its faults are
    (or is the day after, as an open end), and every feed glob there matches a demo feed."""
    import re
    from fnmatch import fnmatchcase
    from pathlib import Path

    from leadline.adapters.cli import demo_scenario

    scenario = build_scenario()
    first = scenario.slot_time(demo_scenario.HISTORY_DAYS * demo_scenario.SLOTS_PER_DAY).date()
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    commands = [line for line in readme.splitlines() if line.startswith("leadline ") and "leadline.toml" in line]
    assert len(commands) >= 6
    dates = {d for line in commands for d in re.findall(r"\d{4}-\d{2}-\d{2}", line)}
    assert dates and all(first.isoformat() <= d <= "2026-10-21" for d in dates), dates
    assert first.isoformat() == "2026-10-19"
    globs = [g for line in commands for g in re.findall(r"'([^']*\*[^']*)'", line)]
    assert globs and all(any(fnmatchcase(f, g) for f in scenario.feeds) for g in globs)


def test_an_incident_stays_active_exactly_while_its_fault_runs(demo):
    # a leak or a drift that runs to the end of the data holds its alarm; a fault that ended (the
    # noise burst, the stuck sensor once freed, the wild reading) leaves nothing active behind
    _, _, result = demo
    scenario = result["scenario"]
    total = len(next(iter(scenario.feeds.values())))
    for index, hits in result["by_fault"].items():
        fault = scenario.faults[index]
        active = [e.event.rule for e in hits if e.event.end is None]
        if fault.end_slot < total:
            assert active == [], f"{fault.kind} on {fault.feed_id} ended, yet {active} still active"
        else:
            assert active, f"{fault.kind} on {fault.feed_id} runs to the end, yet no alarm holds"
