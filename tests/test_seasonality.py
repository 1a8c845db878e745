"""Calendar terms: exact streaming with exog, the airline model, a simulated 15-minute feed."""

from __future__ import annotations

from datetime import date
from pathlib import Path

import numpy as np
import pytest

from leadline.detector.errors import SpecError
from leadline.detector.fitting import fit, ljung_box
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import Stream
from reference import batch_filter, max_relative_difference

DAY_S, WEEK_S = 86400.0, 604800.0
START = 1_780_000_000.0  # 2026-05-28T20:26:40Z


def feed_15min(days: int, seed: int, seasonal: bool = True):
    """Invented district flow: a daily and a weekly cycle plus AR(1) noise (phi 0.6, sd 0.5)."""
    n = days * 96
    epoch = START + 900.0 * np.arange(n)
    cycle = 3 * np.sin(2 * np.pi * epoch / DAY_S) + 1.5 * np.cos(4 * np.pi * epoch / DAY_S) \
        + 2 * np.sin(2 * np.pi * epoch / WEEK_S)
    noise = simulate_arima(n, ar=[0.6], sigma=0.5, seed=seed)
    return epoch, 50 + (cycle if seasonal else 0) + noise


def test_design_comes_from_time_so_gaps_and_odd_intervals_keep_phase():
    terms = CalendarTerms((SeasonalPeriod(DAY_S, 2),), weekend=True, holidays=(date(2026, 12, 25),))
    # 7-minute data: 1 day is not a whole number of slots, but the terms repeat daily.
    t = START + 420.0 * np.arange(500)
    np.testing.assert_allclose(terms.design(t)[:, :4], terms.design(t + DAY_S)[:, :4], atol=1e-9)
    # 2026-12-25 is a Friday (a holiday, not a weekend day); 2026-12-26 is a Saturday.
    x = terms.design(np.array([1798200000.0, 1798286400.0]))  # 2026-12-25T12:00Z, 2026-12-26T12:00Z
    assert terms.names[-2:] == ["weekend", "holiday"]
    assert x[:, -2].tolist() == [0.0, 1.0] and x[:, -1].tolist() == [1.0, 0.0]
    with pytest.raises(SpecError, match="harmonics after ':'"):
        SeasonalPeriod.parse("1d:x")


def test_stream_with_calendar_terms_equals_batch_filter_with_exog_across_a_restart():
    epoch, y = feed_15min(12, seed=5)
    y[100] = np.nan
    y[900:910] = np.nan
    y[1000:1010] = np.nan
    terms = CalendarTerms((SeasonalPeriod(DAY_S, 2), SeasonalPeriod(WEEK_S, 1)), weekend=True)
    n_train = 800
    model = fit(y[:n_train], ModelSpec.arma(1, 1), calendar=terms, timestamps_epoch_s=epoch[:n_train])
    stream = model.stream(model_version=2)
    steps = [stream.update(v) for v in y[n_train:950]]
    stream = Stream.from_bytes(stream.to_bytes())  # a restart: the phase must survive
    steps += [stream.update(v) for v in y[950:]]
    # Reference: statsmodels SARIMAX.filter with the same exog and parameters.
    ref = batch_filter(y, model, exog=terms.design(epoch))
    observed = np.isfinite(y[n_train:])
    error = np.array([s.error for s in steps])
    variance = np.array([s.variance for s in steps])
    forecast = np.array([s.forecast for s in steps])
    sd = np.sqrt(ref.forecasts_error_cov[0, 0, n_train:])
    assert max_relative_difference(error[observed], ref.forecasts_error[0, n_train:][observed],
                                   scale=sd[observed]) <= 1e-8
    assert max_relative_difference(variance, ref.forecasts_error_cov[0, 0, n_train:]) <= 1e-8
    assert max_relative_difference(forecast, ref.forecasts[0, n_train:]) <= 1e-8


@pytest.fixture(scope="module")
def airline() -> np.ndarray:
    path = Path(__file__).parent / "data" / "airline_passengers.csv"
    values = [float(line) for line in path.read_text().splitlines()[4:] if line.strip()]
    assert len(values) == 144 and values[:3] == [112.0, 118.0, 132.0]
    return np.log(values)


def test_airline_model_matches_published_estimates(airline):
    model = fit(airline, ModelSpec((0, 1, 1), (0, 1, 1, 12)))
    # Stata's estimates for the airline model on log air2 (Box & Jenkins Series G), as kept in
    # statsmodels/tsa/statespace/tests/results/results_sarimax.py (air2_stationary):
    # ma -0.4018324, seasonal ma -0.5569342, sigma 0.0367167, log-likelihood 244.69651.
    assert model.params["ma.L1"] == pytest.approx(-0.4018324, abs=1e-3)
    assert model.params["ma.S.L12"] == pytest.approx(-0.5569342, abs=1e-3)
    assert np.sqrt(model.sigma2) == pytest.approx(0.0367167, rel=2e-3)
    assert model.loglik == pytest.approx(244.69651, abs=1e-3)


@pytest.fixture(scope="module")
def seasonal_feed():
    epoch, y = feed_15min(42, seed=17)
    return epoch, y, 28 * 96  # fit on 28 days, hold out a fortnight


def held_out_errors(model, y, n_train):
    stream = model.stream()
    return np.array([stream.update(v).error for v in y[n_train:]])


# The true innovation sd of the AR(1) noise is the simulation's sigma, 0.5.
TRUE_SD = 0.5


def test_calendar_model_forecasts_a_held_out_fortnight(seasonal_feed):
    epoch, y, n_train = seasonal_feed
    terms = CalendarTerms((SeasonalPeriod(DAY_S), SeasonalPeriod(WEEK_S)))  # K chosen by AICc
    model = fit(y[:n_train], ModelSpec.ar(1), calendar=terms, timestamps_epoch_s=epoch[:n_train])
    assert model.calendar.is_resolved and model.harmonics_table
    chosen = min(model.harmonics_table, key=lambda row: row["aicc"])
    assert [p.harmonics for p in model.calendar.periods] == chosen["harmonics"]
    errors = held_out_errors(model, y, n_train)
    assert abs(errors.std() / TRUE_SD - 1) < 0.10
    # Ljung-Box (Ljung & Box 1978) at lag 96, one day, with 1 fitted AR term.
    assert ljung_box(errors / errors.std(), lag=96, model_df=1) > 0.01


def test_without_seasonality_both_checks_fail(seasonal_feed):
    epoch, y, n_train = seasonal_feed
    model = fit(y[:n_train], ModelSpec.ar(1))
    errors = held_out_errors(model, y, n_train)
    assert abs(errors.std() / TRUE_SD - 1) >= 0.10
    assert ljung_box(errors / errors.std(), lag=96, model_df=1) <= 0.01


@pytest.mark.slow
def test_auto_chooses_calendar_terms_for_a_seasonal_feed(seasonal_feed):
    epoch, y, _ = seasonal_feed
    n = 14 * 96
    terms = CalendarTerms((SeasonalPeriod(DAY_S, 2), SeasonalPeriod(WEEK_S, 1)))
    model = fit(y[:n], "auto", calendar=terms, timestamps_epoch_s=epoch[:n])
    assert model.calendar is not None
    table = model.selection.to_dict()["candidates"]
    assert any(row["calendar"] for row in table) and any(not row["calendar"] for row in table)
    assert "calendar" in model.selection.reason


def test_auto_tries_seasonal_differencing_for_a_short_period():
    # Hourly-like data with a period of 4 slots, as a SARIMA with D = 1.
    y = simulate_arima(400, ar=[0.5], seasonal_ma=[-0.5], seasonal_d=1, period=4, mean=10.0, seed=23)
    model = fit(y, "auto", seasonal_period=4)
    labels = [row["model"] for row in model.selection.to_dict()["candidates"]]
    assert any("SARIMA" in label for label in labels)
    assert model.spec.seasonal == (0, 1, 1, 4)
