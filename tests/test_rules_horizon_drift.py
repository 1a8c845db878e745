"""The horizon drift statistic against statsmodels' forecasts and the ARIMA psi-weight forecast errors."""

from __future__ import annotations

import functools
import json
import math

import numpy as np
import pytest
from scipy.stats import kstest, norm
from statsmodels.datasets import nile
from statsmodels.tsa.arima_process import arma2ma, arma_generate_sample
from statsmodels.tsa.statespace.sarimax import SARIMAX

from leadline.detector.errors import RuleError, StateFormatError
from leadline.detector.rules.horizon_drift import HorizonDrift, calibrate_limit, error_covariance
from leadline.detector.statespace import system_from_results
from leadline.detector.stream import Stream

H = 24


def arima_series(n: int, ar: tuple, ma: tuple, seed: int, burn: int = 200) -> np.ndarray:
    """ARIMA(p,1,q) readings: statsmodels' ARMA sampler (its sign convention: lag polynomials), integrated once."""
    rng = np.random.default_rng(seed)
    w = arma_generate_sample(np.r_[1.0, -np.asarray(ar)], np.r_[1.0, np.asarray(ma)], n, burnin=burn,
                             distrvs=rng.standard_normal)
    return 100.0 + np.cumsum(w)


def stream_at_end(results) -> Stream:
    fr = results.filter_results
    return Stream(system_from_results(results), fr.predicted_state[:, -1], fr.predicted_state_cov[:, :, -1],
                  int(results.nobs))


@functools.lru_cache(maxsize=None)
def fitted_111():
    y = arima_series(460, (0.6,), (-0.3,), seed=11)
    res = SARIMAX(y[:400], order=(1, 1, 1)).fit(disp=False)
    return res, y[400:]


@functools.lru_cache(maxsize=None)
def fitted_nile_011():
    # statsmodels' bundled Nile data (annual flow at Aswan, 1871-1970)
    volume = nile.load_pandas().data["volume"].to_numpy(dtype=float)
    res = SARIMAX(volume[:80], order=(0, 1, 1)).fit(disp=False)
    return res, volume[80:]


@pytest.mark.parametrize("make", [fitted_111, fitted_nile_011], ids=["arima111-simulated", "arima011-nile"])
def test_h_step_forecasts_equal_statsmodels_get_forecast(make):
    res, future = make()
    horizon = future.size
    reference = res.get_forecast(horizon)
    mean = np.asarray(reference.predicted_mean, dtype=float)
    var = np.asarray(reference.var_pred_mean, dtype=float)

    stream = stream_at_end(res)
    stat = HorizonDrift(stream.system, horizon)
    stat.anchor(stream.state, stream.cov, stream.step)
    m, v = stat.forecast_from_anchor(horizon)
    np.testing.assert_allclose(m, mean, rtol=1e-8)
    np.testing.assert_allclose(v, var, rtol=1e-8)

    # the same numbers out of the step method, while the stream absorbs the readings
    stat = HorizonDrift(stream.system, horizon)
    for h, value in enumerate(future, start=1):
        r = stat.assess_stream(value, stream)
        stream.update(value)
        assert r.h == h
        assert r.forecast == pytest.approx(mean[h - 1], rel=1e-8)
        assert r.variance == pytest.approx(var[h - 1], rel=1e-8)
        assert r.error == pytest.approx(value - mean[h - 1], rel=1e-8, abs=1e-8 * abs(value))
        assert r.z == pytest.approx((value - mean[h - 1]) / math.sqrt(var[h - 1]), rel=1e-6, abs=1e-9)


@pytest.mark.parametrize("ar,ma", [((0.6,), (-0.3,)), ((), (-0.5,))], ids=["arima111", "arima011"])
def test_sum_variance_equals_psi_weight_form(ar, ma):
    # Box, Jenkins, Reinsel & Ljung, Time Series Analysis, 5th ed. (2015), section 5.1:
    # e_h = sum_{j<h} psi_j a_{s+h-1-j}, so Cov(e_i, e_j) = sigma^2 sum_{l<i} psi_l psi_{l+j-i} (i <= j),
    # psi from statsmodels' arma2ma of the integrated AR polynomial phi(B)(1 - B).
    sigma2 = 2.0
    y = arima_series(600, ar, ma, seed=5)
    params = np.r_[ar, ma, sigma2]
    res = SARIMAX(y, order=(len(ar), 1, len(ma))).filter(params)
    stream = stream_at_end(res)
    ar_poly = np.convolve(np.r_[1.0, -np.asarray(ar)], [1.0, -1.0])
    psi = arma2ma(ar_poly, np.r_[1.0, np.asarray(ma)], lags=H)
    cov = np.empty((H, H))
    for i in range(H):
        for j in range(i, H):
            cov[i, j] = cov[j, i] = sigma2 * float(psi[:i + 1] @ psi[j - i:j + 1])
    np.testing.assert_allclose(error_covariance(stream.system, stream.cov, H), cov, rtol=1e-8)

    stat = HorizonDrift(stream.system, H)
    future = arima_series(H, ar, ma, seed=6) - 100.0 + y[-1]
    for m, value in enumerate(future, start=1):
        r = stat.assess_stream(value, stream)
        stream.update(value)
        assert r.sum_variance == pytest.approx(cov[:m, :m].sum(), rel=1e-8)


def test_missing_reading_drops_out_of_the_sum():
    res, future = fitted_111()
    stream = stream_at_end(res)
    C = error_covariance(stream.system, stream.cov, 10)
    stat = HorizonDrift(stream.system, 10)
    values = future[:10].copy()
    values[3] = np.nan
    for value in values:
        r = stat.assess_stream(value, stream)
        stream.update(value)
    keep = np.array([i != 3 for i in range(10)])
    assert r.readings == 9
    assert r.sum_variance == pytest.approx(C[np.ix_(keep, keep)].sum(), rel=1e-10)


def test_reanchors_every_horizon_and_on_demand():
    res, future = fitted_111()
    stream = stream_at_end(res)
    stat = HorizonDrift(stream.system, 5)
    hs = []
    for i, value in enumerate(future[:13]):
        if i == 8:
            stat.request_anchor()
        hs.append(stat.assess_stream(value, stream).h)
        stream.update(value)
    assert hs == [1, 2, 3, 4, 5, 1, 2, 3, 1, 2, 3, 4, 5]
    stat.reset()
    assert not stat.anchored


def test_state_dict_round_trip_continues_identically():
    res, future = fitted_111()
    stream = stream_at_end(res)
    a = HorizonDrift(stream.system, 8)
    for value in future[:5]:
        a.assess_stream(value, stream)
        stream.update(value)
    saved = json.loads(json.dumps(a.state_dict()))
    assert saved["v"] == 1
    b = HorizonDrift(stream.system, 8)
    b.load_state(saved)
    for value in future[5:20]:
        ra, rb = a.assess_stream(value, stream), b.assess_stream(value, stream)
        stream.update(value)
        assert ra == rb


def test_bad_state_and_settings_are_refused():
    res, _ = fitted_111()
    system = system_from_results(res)
    stat = HorizonDrift(system, 8)
    state = stat.state_dict()
    with pytest.raises(StateFormatError, match="version 1 expected"):
        stat.load_state({**state, "v": 2})
    with pytest.raises(StateFormatError, match="horizon 8"):
        HorizonDrift(system, 9).load_state(state)
    with pytest.raises(StateFormatError, match="missing key"):
        stat.load_state({k: v for k, v in state.items() if k != "sum_e"})
    with pytest.raises(RuleError, match="horizon must be"):
        HorizonDrift(system, 0)
    with pytest.raises(RuleError, match="false_alarms_per_slot"):
        calibrate_limit(system, np.eye(system.k_states), 100, 0.02)


def _true_filter(ar, ma, y: np.ndarray) -> Stream:
    res = SARIMAX(y, order=(len(ar), 1, len(ma))).filter(np.r_[ar, ma, 1.0])
    return stream_at_end(res)


@pytest.mark.slow
@pytest.mark.parametrize("ar,ma", [((0.6,), (-0.3,)), ((), (-0.5,))], ids=["arima111", "arima011"])
def test_accumulated_statistic_is_standard_normal_under_the_model(ar, ma):
    windows = 2000
    y = arima_series(300 + windows * H, ar, ma, seed=21)
    stream = _true_filter(ar, ma, y[:300])
    stat = HorizonDrift(stream.system, H)
    last, mid = [], []
    for value in y[300:]:
        r = stat.assess_stream(value, stream)
        stream.update(value)
        if r.h == H // 2:
            mid.append(r.accumulated)
        if r.h == H:
            last.append(r.accumulated)
    for sample in (np.array(last), np.array(mid)):
        # the windows do not overlap, and the h-step errors of one window are
        # independent of the information at its anchor, so the 2000 values are
        # iid N(0, 1) under the model: the mean has standard error 1/sqrt(2000)
        # = 0.022 and the variance sqrt(2/2000) = 0.032; 4 standard errors
        # leave a false failure at about 6e-5 per check
        assert sample.size == windows
        assert abs(sample.mean()) < 4 / math.sqrt(windows)
        assert abs(sample.var() - 1.0) < 4 * math.sqrt(2 / windows)
        assert kstest(sample, "norm").pvalue > 1e-3


@pytest.mark.slow
def test_ramp_on_arima011_found_far_more_often_than_by_the_one_step_z():
    # the one-step innovations of a ramp of 0.15 sigma per step on ARIMA(0,1,1)
    # with theta = -0.5 settle at 0.15 / (1 + theta) = 0.3 sigma: barely visible
    ar, ma, horizon, rate = (), (-0.5,), 96, 1e-3
    base = _true_filter(ar, ma, arima_series(300, ar, ma, seed=31))
    limit = calibrate_limit(base.system, base.cov, horizon, rate, seed=3)
    z_limit = float(norm.isf(rate / 2))  # iid N(0, 1): the same alarm rate per slot
    assert limit < z_limit
    rng = np.random.default_rng(32)
    trials, found_acc, found_z = 120, 0, 0
    for trial in range(trials):
        y = arima_series(300 + 3 * horizon, ar, ma, seed=1000 + trial)
        stream = _true_filter(ar, ma, y[:300])
        stat = HorizonDrift(stream.system, horizon)
        onset = int(rng.integers(0, horizon))
        future = y[300:].copy()
        future[onset:] += 0.15 * np.arange(1, future.size - onset + 1)
        hit_acc = hit_z = False
        for i, value in enumerate(future[:onset + 2 * horizon]):
            r = stat.assess_stream(value, stream)
            inn = stream.update(value)
            if i >= onset:
                hit_acc |= abs(r.accumulated) > limit
                hit_z |= abs(inn.z) > z_limit
        found_acc += hit_acc
        found_z += hit_z
    # measured while writing this check: about 0.75 against 0.3; the standard
    # error of the difference of two proportions over 120 trials is below 0.065
    assert found_acc / trials > found_z / trials + 0.25
    assert found_acc / trials > 0.6


@pytest.mark.slow
def test_calibrated_limit_holds_its_alarm_rate_on_simulated_series():
    ar, ma, rate = (), (-0.5,), 1e-3
    windows = 2000
    y = arima_series(300 + windows * H, ar, ma, seed=41)
    stream = _true_filter(ar, ma, y[:300])
    limit = calibrate_limit(stream.system, stream.cov, H, rate, seed=4)
    stat = HorizonDrift(stream.system, H)
    alarmed, window_hit = 0, False
    for value in y[300:]:
        r = stat.assess_stream(value, stream)
        stream.update(value)
        window_hit |= abs(r.accumulated) > limit
        if r.h == H:
            alarmed += window_hit
            window_hit = False
    expected = rate * H * windows  # 48 windows with an alarm
    # binomial(2000, 0.024): standard deviation 6.8; 4 of them
    assert abs(alarmed - expected) < 4 * math.sqrt(expected * (1 - rate * H))
