"""Calendar terms on local clock time in an IANA time zone, through daylight-saving changes."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pytest

from leadline.detector.errors import SpecError
from leadline.detector.fitting import fit
from leadline.detector.seasonality import DAY_S, CalendarTerms, SeasonalPeriod, utc_offsets_s, zone_info
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import Stream


def utc(*args) -> float:
    return datetime(*args, tzinfo=timezone.utc).timestamp()


def test_london_offsets_change_at_the_published_2026_transitions():
    # IANA tz database, Europe/London (EU rule: last Sunday of March and of October at 01:00 UTC):
    # BST begins 2026-03-29 01:00 UTC and ends 2026-10-25 01:00 UTC.
    zone = zone_info("Europe/London")
    t = np.array([utc(2026, 3, 29, 0, 59, 59), utc(2026, 3, 29, 1), utc(2026, 10, 25, 0, 59, 59),
                  utc(2026, 10, 25, 1)])
    assert utc_offsets_s(t, zone).tolist() == [0.0, 3600.0, 3600.0, 0.0]


def test_daily_terms_follow_the_local_clock_across_both_changes():
    local = CalendarTerms((SeasonalPeriod(DAY_S, 2),), timezone="Europe/London")
    fixed = CalendarTerms((SeasonalPeriod(DAY_S, 2),))
    # 08:00 local is 07:00 UTC in summer and 08:00 UTC in winter: the same daily terms.
    summer, winter = utc(2026, 7, 1, 7), utc(2026, 11, 2, 8)
    np.testing.assert_allclose(local.design(np.array([summer])), local.design(np.array([winter])), atol=1e-12)
    np.testing.assert_allclose(local.design(np.array([winter])), fixed.design(np.array([winter])), atol=1e-12)
    # Across the March change the local clock jumps from 00:59:59 to 02:00.
    before, after = utc(2026, 3, 29, 0, 59, 59), utc(2026, 3, 29, 1)
    np.testing.assert_allclose(local.design(np.array([after])), fixed.design(np.array([utc(2026, 3, 29, 2)])),
                               atol=1e-12)
    np.testing.assert_allclose(local.design(np.array([before])), fixed.design(np.array([before])), atol=1e-12)


def test_weekend_flag_starts_at_local_midnight():
    terms = CalendarTerms(weekend=True, timezone="America/New_York")
    # Friday 2026-07-03 23:30 EDT = Saturday 03:30 UTC: still a weekday locally.
    assert terms.design(np.array([utc(2026, 7, 4, 3, 30)]))[0, 0] == 0.0
    assert terms.design(np.array([utc(2026, 7, 4, 4, 30)]))[0, 0] == 1.0


def test_bad_zone_or_zone_with_offset_is_refused():
    with pytest.raises(SpecError, match="IANA tz database"):
        CalendarTerms((SeasonalPeriod(DAY_S, 1),), timezone="Mars/Olympus")
    with pytest.raises(SpecError, match="not both"):
        CalendarTerms((SeasonalPeriod(DAY_S, 1),), utc_offset_s=3600.0, timezone="Europe/London")


def test_saved_terms_keep_their_zone_and_old_saved_offsets_still_load():
    terms = CalendarTerms((SeasonalPeriod(DAY_S, 2),), weekend=True, timezone="Europe/London")
    assert CalendarTerms.from_dict(terms.to_dict()) == terms
    old = {"periods": [[DAY_S, 2]], "weekend": True, "holidays": [], "utc_offset_s": 3600.0}
    loaded = CalendarTerms.from_dict(old)
    assert loaded.timezone is None and loaded.utc_offset_s == 3600.0


@pytest.fixture(scope="module")
def october_feed():
    """An invented 15-minute feed whose daily shape is set by the local clock of Europe/London,
    four weeks around the change of 2026-10-25, plus AR(1) noise."""
    epoch = utc(2026, 10, 11) + 900.0 * np.arange(28 * 96)
    zone = zone_info("Europe/London")
    hour = ((epoch + utc_offsets_s(epoch, zone)) % DAY_S) / 3600.0
    shape = 4.0 * np.sin(2 * np.pi * hour / 24) + 2.0 * np.cos(4 * np.pi * hour / 24)
    return epoch, 30.0 + shape + simulate_arima(epoch.size, ar=[0.5], sigma=0.4, seed=12)


def test_local_terms_fit_a_local_daily_curve_better_than_fixed_offset_terms(october_feed):
    epoch, y = october_feed
    spec = ModelSpec.ar(1)
    local = fit(y, spec, calendar=CalendarTerms((SeasonalPeriod(DAY_S, 2),), timezone="Europe/London"),
                timestamps_epoch_s=epoch)
    fixed = fit(y, spec, calendar=CalendarTerms((SeasonalPeriod(DAY_S, 2),), utc_offset_s=3600.0),
                timestamps_epoch_s=epoch)
    # A fixed offset is an hour off for the fortnight after the change; the local terms are not.
    assert local.loglik > fixed.loglik + 50
    assert local.aicc < fixed.aicc
    assert local.sigma2 == pytest.approx(0.16, rel=0.15)
    # The stream continues on local time after a restart.
    stream = Stream.from_bytes(local.stream().to_bytes())
    assert stream.regression.terms.timezone == "Europe/London"


def test_config_timezone_reaches_the_feed_calendar(tmp_path):
    from leadline.adapters.config import config_from_text
    from leadline.adapters.service.wiring import feed_settings
    from leadline.detector.errors import ConfigError

    text = '[feeds.defaults]\nseasonality = ["1d:2"]\ntimezone = "Europe/London"\n'
    config = config_from_text(text, tmp_path / "leadline.toml")
    calendar = feed_settings(config, "site/flow").calendar
    assert calendar.timezone == "Europe/London" and calendar.utc_offset_s == 0.0
    with pytest.raises(ConfigError, match="IANA"):
        config_from_text('[feeds.defaults]\ntimezone = "Mars/Olympus"\n', tmp_path / "leadline.toml")
    with pytest.raises(ConfigError, match="do not go together"):
        config_from_text('[feeds.defaults]\ntimezone = "Europe/London"\nutc_offset = "1h"\n',
                         tmp_path / "leadline.toml")


def test_auto_refit_looks_for_cycles_in_the_feeds_time_zone():
    from leadline.detector.engine import FeedSettings, RefitRequest, run_refit
    from leadline.detector.errors import ConfigError

    epoch = utc(2026, 10, 18) + 900.0 * np.arange(10 * 96)
    zone = zone_info("Europe/London")
    hour = ((epoch + utc_offsets_s(epoch, zone)) % DAY_S) / 3600.0
    y = 30.0 + 3.0 * np.sin(2 * np.pi * hour / 24) + simulate_arima(epoch.size, ar=[0.5], sigma=0.4, seed=8)
    request = RefitRequest(feed_id="site/flow", values=y, epoch_s=epoch, spec="auto", calendar=None,
                           reason="initial fit", interval_s=900.0, timezone="Europe/London")
    fitted = run_refit(request)
    assert fitted.calendar is not None and fitted.calendar.timezone == "Europe/London"
    assert fitted.calendar.has_period(DAY_S)
    with pytest.raises(ConfigError, match="timezone"):
        FeedSettings(timezone="Mars/Olympus")
