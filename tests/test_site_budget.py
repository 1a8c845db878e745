"""The site's false-alarm budget: shared among the feeds, and the alarm load ``leadline status`` shows.

The arithmetic is the budget's definition (per feed per week = site rate per
hour x 168 h / feeds); the expected values below are worked by hand from it.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone

import pytest

from leadline.adapters.cli import main
from leadline.adapters.config import config_from_text
from leadline.adapters.store import open_store
from leadline.detector.errors import ConfigError
from leadline.detector.feed_settings import FeedSettings

T0 = datetime(2026, 7, 1, tzinfo=timezone.utc)


def test_the_default_budget_is_0_2_per_feed_per_week_and_the_config_reads_it(tmp_path):
    assert FeedSettings().false_alarms_per_week == 0.2
    assert config_from_text("", tmp_path / "x.toml").feed_settings("any")["false_alarms_per_week"] == 0.2


def test_the_site_budget_is_shared_among_the_expected_feeds(tmp_path):
    config = config_from_text("[site]\nfalse_alarms_per_operator_hour = 0.5\nexpected_feeds = 40\n",
                              tmp_path / "x.toml")
    # 0.5 per hour x 168 h / 40 feeds = 2.1 per feed per week
    assert config.site.per_feed_per_week == pytest.approx(2.1)
    assert config.feed_settings("tarnbeck/flow/fm-1")["false_alarms_per_week"] == pytest.approx(2.1)
    over = config_from_text("[site]\nfalse_alarms_per_operator_hour = 0.5\nexpected_feeds = 40\n"
                            "[[feeds.override]]\nmatch = 'tarnbeck/critical/*'\nfalse_alarms_per_week = 0.05\n",
                            tmp_path / "y.toml")
    assert over.feed_settings("tarnbeck/critical/pt-1")["false_alarms_per_week"] == 0.05


def test_without_expected_feeds_the_named_feeds_count(tmp_path):
    text = ("[[sources.csv]]\nname = 'logger'\npath = 'x.csv'\nformat = 'wide'\n"
            "columns.feeds = { 'P1' = 'tarnbeck/p1', 'P2' = 'tarnbeck/p2', 'Q1' = 'tarnbeck/q1' }\n"
            "[site]\nfalse_alarms_per_operator_hour = 0.03\n")
    config = config_from_text(text, tmp_path / "x.toml")
    assert config.site.feeds == 3 and config.site.feeds_from == "configured feeds"
    assert config.site.per_feed_per_week == pytest.approx(0.03 * 168 / 3)  # 1.68


@pytest.mark.parametrize("text, fragment", [
    ("[site]\nexpected_feeds = 4\n", "site.false_alarms_per_operator_hour"),
    ("[site]\nfalse_alarms_per_operator_hour = 0.1\n", "site.expected_feeds"),
    ("[site]\nfalse_alarms_per_operator_hour = -1\nexpected_feeds = 4\n", "site.false_alarms_per_operator_hour"),
    ("[site]\nfalse_alarms_per_operator_hour = 0.1\nexpected_feeds = 4\n[feeds.defaults]\n"
     "false_alarms_per_week = 1\n", "feeds.defaults.false_alarms_per_week"),
])
def test_site_mistakes_are_named(tmp_path, text, fragment):
    with pytest.raises(ConfigError, match=fragment.replace(".", r"\.")):
        config_from_text(text, tmp_path / "x.toml")


def _budget_limits(false_alarms: float) -> dict:
    return {"format": "leadline.thresholds", "format_version": 1, "mode": "budget",
            "budget": {"false_alarms": false_alarms, "per_s": 604800.0}}


def test_status_shows_the_alarm_load_and_the_fit_problems_with_their_remedy(tmp_path, capsys):
    db = tmp_path / "site.db"
    config = tmp_path / "leadline.toml"
    config.write_text(f"[store]\nurl = 'sqlite:///{db}'\n[site]\nfalse_alarms_per_operator_hour = 0.05\n"
                      "expected_feeds = 3\n[shifts]\ntimezone = 'UTC'\nday = '06:00-18:00'\n"
                      "night = '18:00-06:00'\n")
    advice = [{"kind": "near_unit_root", "text": "the AR root is close to 1.", "remedy": "try d = 1"}]
    with open_store(f"sqlite:///{db}") as store:
        for feed, budget, stats in (("tarnbeck/p1", 2.8, {"advice": advice}), ("tarnbeck/p2", 2.8, {}),
                                    ("tarnbeck/q1", 2.8, {})):
            store.record_model(feed, "ARIMA(1,0,0)", {}, _budget_limits(budget), stats, T0, T0, T0,
                               "initial fit")
    assert main(["status", "--config", str(config), "--format", "json"]) == 0
    load = json.loads(capsys.readouterr().out)["alarm_load"]
    # 3 x 2.8 = 8.4 per week = 0.05 per hour = 0.6 per 12-hour shift
    assert load["per_week"] == pytest.approx(8.4) and load["per_hour"] == pytest.approx(0.05)
    assert load["per_shift"] == pytest.approx(0.6) and load["shift_hours"] == 12.0
    assert load["site"]["per_feed_per_week"] == pytest.approx(2.8)
    assert main(["status", "--config", str(config)]) == 0
    text = capsys.readouterr().out
    assert "0.05 per hour, 0.6 per 12-hour shift" in text
    # the health view's FIT PROBLEMS column, on the feed's own line
    line = next(row for row in text.splitlines() if row.startswith("tarnbeck/p1"))
    assert "the AR root is close to 1. (advice: try d = 1)" in line
