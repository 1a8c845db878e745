"""The replay's fast path (quiet runs) against the per-reading engine: the same states, the same incidents.

The invented Brackenholt district has eight feeds, each with something for
the rules to find: a wild reading, a level shift and its return, a frozen
quantized transmitter, a burst of noise, an out-of-range reading, gaps,
late and off-grid readings, jittered timestamps, a change of dynamics that
the diagnostics checks find, a daily cycle fitted with calendar terms. The reference is the
engine taking every reading one by one (statsmodels fits both paths'
models); the fast path must leave every feed in the same state, checkpoint
byte for byte, and give the same events, models and evidence.
"""

from __future__ import annotations

import math
from dataclasses import asdict, replace
from datetime import datetime, timezone

import numpy as np
import pytest

from leadline.adapters.replay.history import FeedHistory
from leadline.adapters.replay.runner import replay_group
from leadline.detector.engine import run_refit_with_thresholds
from leadline.detector.feed import FeedLifecycle
from leadline.detector.feed_settings import FeedSettings
from leadline.detector.feed_state import feed_checkpoint
from leadline.detector.engine_output import EngineOutput
from leadline.detector.fitting import fit
from leadline.detector.quiet_run import _scan_function, advance_quiet, learn_quiet
from leadline.detector.readings import Reading
from leadline.detector.rules import MonitorConfig
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from reference import batch_filter, max_relative_difference
from test_stream_exactness import N_TRAIN, RTOL, with_gaps
from test_stream_exactness import cases as exactness_cases

START = datetime(2026, 5, 4, tzinfo=timezone.utc)
INTERVAL_S = 900.0
N = 1600  # about 16.7 days of 15-minute readings: 16 scheduled refits


def _history(feed_id: str, values: np.ndarray, epochs: np.ndarray | None = None) -> FeedHistory:
    if epochs is None:
        epochs = START.timestamp() + INTERVAL_S * np.arange(values.size)
    return FeedHistory(feed_id, np.asarray(epochs, dtype=float), np.asarray(values, dtype=float))


def site() -> tuple[list[FeedHistory], dict[str, FeedSettings]]:
    """The eight Brackenholt feeds and their settings (seeded)."""
    base = FeedSettings(spec=ModelSpec(order=(1, 0, 0)), interval_s=INTERVAL_S, train_points=300,
                        min_train_points=100, refit_window_points=600, threshold_mode="sigma")
    feeds, settings = [], {}

    intake = simulate_arima(N, ar=[0.6], mean=4.0, sigma=0.05, seed=11)
    intake[600] += 1.2  # a wild reading, 24 sigma
    intake[900:1100] += 0.4  # a level shift of 8 sigma and its return
    feeds.append(_history("brackenholt/intake/level", intake))
    settings["brackenholt/intake/level"] = base

    tower = np.round(simulate_arima(N, ar=[0.8], mean=6.0, sigma=0.06, seed=12), 1)  # quantized to 0.1
    tower[800:900] = tower[800]  # the transmitter freezes
    feeds.append(_history("brackenholt/tower/pressure", tower))
    settings["brackenholt/tower/pressure"] = replace(base, threshold_mode="budget")

    main = simulate_arima(N, ar=[0.5], mean=20.0, sigma=0.3, seed=13)
    main[700:760] += np.random.default_rng(14).normal(0.0, 1.5, 60)  # a loose connection
    main[1000] = 80.0  # beyond the engineering range
    feeds.append(_history("brackenholt/main/flow", main))
    settings["brackenholt/main/flow"] = replace(base, monitor=MonitorConfig(range_low=0.0, range_high=60.0))

    booster = simulate_arima(N, ar=[0.7], mean=3.0, sigma=0.04, seed=15)
    rng = np.random.default_rng(16)
    epochs = START.timestamp() + INTERVAL_S * np.arange(N) + rng.uniform(-60.0, 60.0, N)  # jittered clocks
    epochs[450] += 0.4 * INTERVAL_S  # off the grid
    # times as a history holds them: a UTC datetime's timestamp, to the microsecond
    epochs = np.array([datetime.fromtimestamp(e, tz=timezone.utc).timestamp() for e in epochs])
    keep = np.ones(N, dtype=bool)
    keep[500:524] = False  # six hours silent: the stale rule
    keep[rng.choice(np.arange(550, N), 30, replace=False)] = False  # single readings lost
    order = np.flatnonzero(keep)
    order = np.insert(order, 700, order[698])  # a late reading, delivered again
    feeds.append(_history("brackenholt/booster/pressure", booster[order], epochs[order]))
    settings["brackenholt/booster/pressure"] = base

    reservoir = simulate_arima(N, ar=[0.9], ma=[0.4], mean=12.0, sigma=0.02, seed=17)  # ARMA(1,1): two states
    reservoir[1200:] += 0.2
    feeds.append(_history("brackenholt/reservoir/level", reservoir))
    settings["brackenholt/reservoir/level"] = replace(base, spec=ModelSpec(order=(1, 0, 1)),
                                                      threshold_mode="budget")

    weir = simulate_arima(N, ar=[1.2, -0.4], mean=1.5, sigma=0.01, seed=18)  # AR(2), insulation off
    weir[1300] -= 0.3
    feeds.append(_history("brackenholt/weir/level", weir))
    settings["brackenholt/weir/level"] = replace(base, spec=ModelSpec(order=(2, 0, 0)),
                                                 monitor=MonitorConfig(insulate_outliers=False))
    # no scheduled refits: the diagnostics checks fall due every 48 readings; the dynamics change
    # at reading 1000 (phi 0.3 -> 0.7), which a check finds, and the feed is refitted on it
    spring = np.concatenate([simulate_arima(1000, ar=[0.3], mean=8.0, sigma=0.1, seed=19),
                             simulate_arima(N - 1000, ar=[0.7], mean=8.0, sigma=0.07, seed=20)])
    feeds.append(_history("brackenholt/spring/flow", spring))
    settings["brackenholt/spring/flow"] = replace(base, refit_every_s=None, threshold_mode="budget")
    # a daily cycle, fitted with calendar terms on the local clock of an invented site's zone:
    # d_t changes every slot, and the level condition keeps readings less the cycle
    hours = (START.timestamp() + INTERVAL_S * np.arange(N)) / 3600.0
    kiln = simulate_arima(N, ar=[0.5], mean=40.0, sigma=0.2, seed=21) + 3.0 * np.sin(2 * np.pi * hours / 24.0)
    kiln[1250:1300] += 2.5
    feeds.append(_history("brackenholt/kiln/temperature", kiln))
    settings["brackenholt/kiln/temperature"] = replace(
        base, calendar=CalendarTerms(periods=(SeasonalPeriod(86400.0, 2),), timezone="Europe/Dublin"))
    return feeds, settings


@pytest.fixture(scope="module")
def brackenholt():
    return site()


def _drive(history: FeedHistory, settings: FeedSettings, fast: bool, stops: set[int]) -> tuple[dict[int, tuple], int]:
    """One feed through a bare FeedLifecycle (no clock), refits inline; its state at ``stops``
    and, on the fast path, after every quiet run: {readings taken: (checkpoint, status)}, and
    the number of quiet runs."""
    feed = FeedLifecycle(history.feed_id, settings)
    epochs, values = history.epoch_s, history.values
    no_clock = np.full(epochs.size, np.nan)
    states, version, i, runs = {}, 0, 0, 0
    while i < epochs.size:
        run = advance_quiet(feed, epochs[i:], values[i:], no_clock[i:]) if fast else None
        learnt = learn_quiet(feed, epochs[i:], values[i:], no_clock[i:]) if fast and run is None else 0
        if run is not None:
            out, i, runs = run.output, i + run.count, runs + 1
        elif learnt:
            out, i = EngineOutput(), i + learnt
        else:
            reading = Reading(history.feed_id, datetime.fromtimestamp(epochs[i], tz=timezone.utc), float(values[i]))
            out, i = feed.process(reading, None), i + 1
        for request in out.refit_requests:
            fitted, thresholds = run_refit_with_thresholds(request)
            version += 1
            feed.install(fitted, version, request.reason, thresholds, request)
        if feed.state == "watching" and (i in stops or run is not None):
            states[i] = (feed_checkpoint(feed), feed.status())
    return states, runs


@pytest.mark.parametrize("index", range(8))
def test_a_quiet_run_leaves_the_feed_as_the_readings_one_by_one_do(brackenholt, index):
    feeds, settings = brackenholt
    history = feeds[index]
    every = set(range(0, history.epoch_s.size + 1, 37))
    fast, runs = _drive(history, settings[history.feed_id], True, every)
    assert runs >= 3, "the fast path took too few quiet runs to be tested"
    slow, _ = _drive(history, settings[history.feed_id], False, set(fast))
    for taken in sorted(fast):
        checkpoint, status = fast[taken]
        assert status == slow[taken][1], f"{history.feed_id}: status differs after {taken} readings"
        assert checkpoint == slow[taken][0], f"{history.feed_id}: checkpoint differs after {taken} readings"


def _events_by_feed(result) -> dict[str, list]:
    out: dict[str, list] = {}
    for event in result.events:
        out.setdefault(event.feed_id, []).append(asdict(event))
    return out


def test_the_fast_replay_gives_the_incidents_models_and_evidence_of_the_per_reading_engine(brackenholt):
    feeds, settings = brackenholt
    fast = replay_group(feeds, settings, fast=True)
    slow = replay_group(feeds, settings, fast=False)
    assert fast.readings == slow.readings == sum(f.epoch_s.size for f in feeds)
    # the learning windows (300 of 1,600 readings a feed) and the episodes go one by one
    assert fast.quiet_readings > 0.6 * fast.readings, fast.quiet_readings
    rules = {event.rule for event in slow.events}
    # every kind of fault planted was found, so the comparison covers each rule's episodes
    assert {"spike", "cusum", "flatline", "noise_burst", "range", "stale"} <= rules, rules
    assert _events_by_feed(fast) == _events_by_feed(slow)
    assert fast.failed_fits == slow.failed_fits
    assert sorted((asdict(m) for m in fast.models), key=lambda m: (m["feed_id"], m["local_version"])) == \
        sorted((asdict(m) for m in slow.models), key=lambda m: (m["feed_id"], m["local_version"]))
    fast_evidence = {record.key + (record.complete,): record for record in fast.evidence}
    slow_evidence = {record.key + (record.complete,): record for record in slow.evidence}
    assert fast_evidence.keys() == slow_evidence.keys()
    for key, record in slow_evidence.items():
        other = fast_evidence[key]
        assert (other.end, other.omitted_slots) == (record.end, record.omitted_slots), key
        for name in ("epoch_s", "value", "forecast", "lower", "upper"):
            assert np.array_equal(getattr(other, name), getattr(record, name), equal_nan=True), (key, name)


def test_a_feed_with_an_open_episode_or_an_uncovered_rule_is_left_to_the_per_reading_path(brackenholt):
    feeds, settings = brackenholt
    history = feeds[0]
    feed = FeedLifecycle(history.feed_id, settings[history.feed_id])
    no_clock = np.full(history.epoch_s.size, np.nan)
    assert advance_quiet(feed, history.epoch_s, history.values, no_clock) is None  # still learning
    feed, i = _watching(history, replace(settings[history.feed_id], sigma_limits={"ewma_lam": 0.2}))
    before = feed_checkpoint(feed)
    assert "ewma" in feed.monitor.rules
    assert advance_quiet(feed, history.epoch_s[i:], history.values[i:], no_clock[i:]) is None
    assert feed_checkpoint(feed) == before


def _watching(history: FeedHistory, feed_settings: FeedSettings) -> tuple[FeedLifecycle, int]:
    """A feed driven reading by reading until it has watched 20 readings (its filter steady by
    then) with no fit in flight; the readings taken."""
    feed = FeedLifecycle(history.feed_id, feed_settings)
    i = 0
    while feed.state != "watching" or feed.pending is not None or feed.monitor.readings < 20:
        reading = Reading(history.feed_id, datetime.fromtimestamp(history.epoch_s[i], tz=timezone.utc),
                          float(history.values[i]))
        for request in feed.process(reading, None).refit_requests:
            fitted, thresholds = run_refit_with_thresholds(request)
            feed.install(fitted, 1, request.reason, thresholds, request)
        i += 1
    return feed, i


def test_readings_ahead_of_the_clock_end_a_run_before_them(brackenholt):
    feeds, settings = brackenholt
    history = feeds[0]
    feed, i = _watching(history, settings[history.feed_id])
    clock = history.epoch_s[i:] - INTERVAL_S  # the clock one interval behind each reading
    control = advance_quiet(feed, history.epoch_s[i:], history.values[i:], clock)
    assert control is not None and control.count >= 8
    feed, i = _watching(history, settings[history.feed_id])
    held = control.count // 2
    clock[held:] -= 2 * 3600.0  # two hours behind: beyond the default tolerance of an hour
    run = advance_quiet(feed, history.epoch_s[i:], history.values[i:], clock)
    assert run is not None and run.count == held


N_STREAM = 1500  # long enough for the slowest family (the airline model) to reach its steady state


@pytest.mark.parametrize("spec, series", list(exactness_cases(N_STREAM)))
def test_the_quiet_scan_equals_statsmodels_batch_filter(spec, series):
    """The scan loop of the quiet runs, stretch by stretch between the gaps, against statsmodels'
    SARIMAX ``filter()`` with the fitted parameters (the families of the exactness table, with
    single gaps and a run of 10): forecasts, innovations and z to 1e-8 relative."""
    y = with_gaps(series)
    model = fit(y[:N_TRAIN], spec)
    stream = model.stream()
    forecast = np.full(N_STREAM, np.nan)
    z = np.full(N_STREAM, np.nan)
    scanned, i = 0, 0
    while i < N_STREAM:
        stretch = y[N_TRAIN + i:]
        finite = int(np.argmin(np.isfinite(stretch))) if not np.isfinite(stretch).all() else stretch.size
        if stream.is_steady and stream.regression is None and finite >= 2:
            scan, coefficients = _scan_function(stream.system, False, False, False)
            taken, a, forecasts, zs, _, _ = scan(stretch[:finite].tolist(), None, stream._a_tuple, stream._gain,
                                                 stream._d_const, stream.step, stream._sqrtF_ss, math.inf,
                                                 (0.0,) * 10, (None, 0, 0.0, 0.0, 0.0, None, 0.0), coefficients)
            assert taken == finite
            forecast[i:i + taken], z[i:i + taken] = forecasts, zs
            stream._a_tuple, stream._t = a, stream.step + taken
            scanned, i = scanned + taken, i + taken
        else:
            step = stream.update(y[N_TRAIN + i])
            forecast[i], z[i] = step.forecast, step.z
            i += 1
    assert scanned > N_STREAM // 3, "the scan took too little of the series to be tested"
    # Reference: statsmodels SARIMAX.filter over the same series and parameters (forecasts and
    # standardized_forecasts_error), as in tests/test_stream_exactness.py.
    ref = batch_filter(y, model)
    observed = np.isfinite(y[N_TRAIN:])
    ref_sd = np.sqrt(ref.forecasts_error_cov[0, 0, N_TRAIN:])
    assert max_relative_difference(forecast, ref.forecasts[0, N_TRAIN:]) <= RTOL
    error = y[N_TRAIN:] - forecast
    assert max_relative_difference(error[observed], ref.forecasts_error[0, N_TRAIN:][observed],
                                   scale=ref_sd[observed]) <= RTOL
    assert max_relative_difference(z[observed], ref.standardized_forecasts_error[0, N_TRAIN:][observed],
                                   scale=1.0) <= RTOL
