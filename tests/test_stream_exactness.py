"""The recursive step equals statsmodels' batch filter, step by step, for every family.

Reference: statsmodels SARIMAX ``filter()`` over the whole series with the
fitted parameters; compared are ``forecasts_error``, ``forecasts_error_cov``
and ``standardized_forecasts_error`` on every observed slot after the fit
window, with single missing slots and a run of 10 missing slots in both the
fit window and the streamed part. Tolerance: 1e-8 relative (leadline's own
exactness requirement, stated in DEVELOPERS.md); an
innovation is compared relative to max(|v_t|, sqrt(F_t)) and z_t relative to
max(|z_t|, 1), so that a near-zero innovation is judged on its own scale.
statsmodels freezes F_t once its own filter converges, which is where the
last 1e-10 of difference comes from.
"""

from __future__ import annotations

import numpy as np
import pytest

from leadline.detector.bank import StreamBank
from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import Stream
from reference import batch_filter, max_relative_difference

N_TRAIN = 500
N_STREAM = 400
RTOL = 1e-8

# (name, spec, simulation kwargs)
FAMILIES = [
    ("white noise + const", ModelSpec.white_noise(), dict(mean=50.0)),
    ("AR(1)", ModelSpec.ar(1), dict(ar=[0.8], mean=12.0)),
    ("AR(2)", ModelSpec.ar(2), dict(ar=[0.6, -0.3], mean=3.0)),
    ("AR(5)", ModelSpec.ar(5), dict(ar=[0.4, -0.2, 0.15, -0.1, 0.05], mean=-2.0)),
    ("MA(1)", ModelSpec.ma(1), dict(ma=[0.6], mean=7.0)),
    ("MA(2)", ModelSpec.ma(2), dict(ma=[0.5, 0.3])),
    ("MA(4)", ModelSpec.ma(4), dict(ma=[0.4, 0.3, -0.2, 0.2])),
    ("ARMA(1,1)", ModelSpec.arma(1, 1), dict(ar=[0.7], ma=[0.3], mean=100.0)),
    ("ARMA(2,2)", ModelSpec.arma(2, 2), dict(ar=[0.5, -0.25], ma=[0.4, 0.2], mean=1.0)),
    ("ARIMA(1,1,1)", ModelSpec.arima(1, 1, 1), dict(ar=[0.5], ma=[0.3], d=1, mean=20.0)),
    ("ARIMA(0,1,1)", ModelSpec.arima(0, 1, 1), dict(ma=[-0.6], d=1, mean=5.0)),
    ("ARIMA(2,1,2) + drift", ModelSpec.arima(2, 1, 2, drift=True),
     dict(ar=[0.5, -0.2], ma=[0.3, 0.2], d=1, drift=0.05)),
    ("ARIMA(1,2,1)", ModelSpec.arima(1, 2, 1), dict(ar=[0.4], ma=[-0.3], d=2, sigma=0.1)),
]


def with_gaps(y: np.ndarray) -> np.ndarray:
    """Single gaps and a run of 10, in the fit window and in the streamed part."""
    y = y.copy()
    for i in (37, 211, N_TRAIN + 5, N_TRAIN + 90, N_TRAIN + 301):
        y[i] = np.nan
    y[300:310] = np.nan
    y[N_TRAIN + 150 : N_TRAIN + 160] = np.nan
    return y


def cases(n_stream: int = N_STREAM):
    """Every family, N_TRAIN readings to fit and ``n_stream`` to stream (seeded)."""
    n = N_TRAIN + n_stream
    for i, (name, spec, kwargs) in enumerate(FAMILIES):
        yield pytest.param(spec, simulate_arima(n, seed=100 + i, **kwargs), id=name)
    yield pytest.param(ModelSpec((1, 0, 0), (0, 1, 1, 4), "n"),
                       simulate_arima(n, ar=[0.5], seasonal_ma=[-0.5], seasonal_d=1, period=4, mean=40.0, seed=7),
                       id="SARIMA(1,0,0)(0,1,1)_4")
    yield pytest.param(ModelSpec((0, 1, 1), (0, 1, 1, 12), "n"),
                       simulate_arima(n, ma=[-0.4], d=1, seasonal_ma=[-0.6], seasonal_d=1, period=12, seed=8),
                       id="SARIMA(0,1,1)(0,1,1)_12 (airline)")


@pytest.mark.parametrize("spec, series", list(cases()))
def test_stream_equals_batch_filter(spec, series):
    y = with_gaps(series)
    model = fit(y[:N_TRAIN], spec)
    stream = model.stream()
    steps = [stream.update(v) for v in y[N_TRAIN:]]
    ref = batch_filter(y, model)
    observed = np.isfinite(y[N_TRAIN:])

    error = np.array([s.error for s in steps])
    variance = np.array([s.variance for s in steps])
    z = np.array([s.z for s in steps])
    # Reference: statsmodels SARIMAX.filter, forecasts_error / forecasts_error_cov /
    # standardized_forecasts_error over the same series and parameters.
    ref_sd = np.sqrt(ref.forecasts_error_cov[0, 0, N_TRAIN:])
    assert max_relative_difference(error[observed], ref.forecasts_error[0, N_TRAIN:][observed],
                                   scale=ref_sd[observed]) <= RTOL
    assert max_relative_difference(variance, ref.forecasts_error_cov[0, 0, N_TRAIN:]) <= RTOL
    assert max_relative_difference(z[observed], ref.standardized_forecasts_error[0, N_TRAIN:][observed],
                                   scale=1.0) <= RTOL
    forecast = np.array([s.forecast for s in steps])
    assert max_relative_difference(forecast, ref.forecasts[0, N_TRAIN:]) <= RTOL
    # A missing slot gives no score (our documented meaning).
    assert np.isnan(error[~observed]).all() and np.isnan(z[~observed]).all()


@pytest.mark.parametrize("spec, series", [c for c in cases() if c.id in ("AR(1)", "ARIMA(2,1,2) + drift")],
                         ids=["AR(1)", "ARIMA(2,1,2) + drift"])
def test_steady_state_gain_is_used_and_left_after_a_gap(spec, series):
    model = fit(series[:N_TRAIN], spec)
    stream = model.stream()
    for v in series[N_TRAIN : N_TRAIN + 100]:
        stream.update(v)
    assert stream.is_steady
    stream.update(np.nan)
    assert not stream.is_steady
    for v in series[N_TRAIN + 101 : N_TRAIN + 250]:
        stream.update(v)
    assert stream.is_steady


@pytest.mark.parametrize("spec, series", list(cases())[:: 4])
def test_restart_from_bytes_continues_exactly(spec, series):
    y = with_gaps(series)
    model = fit(y[:N_TRAIN], spec)
    uninterrupted = model.stream(model_version=3)
    restarted = model.stream(model_version=3)
    for v in y[N_TRAIN : N_TRAIN + 200]:
        uninterrupted.update(v)
        restarted.update(v)
    restarted = Stream.from_bytes(restarted.to_bytes())
    assert restarted.model_version == 3
    a = [uninterrupted.update(v) for v in y[N_TRAIN + 200 :]]
    b = [restarted.update(v) for v in y[N_TRAIN + 200 :]]
    assert [x.error for x in a] == pytest.approx([x.error for x in b], rel=1e-12, nan_ok=True)
    assert [x.variance for x in a] == pytest.approx([x.variance for x in b], rel=1e-12)


def test_absorb_false_equals_batch_filter_with_the_reading_missing():
    # Reference: statsmodels' batch filter with that slot set to NaN, since an
    # unabsorbed reading advances the state exactly as a missing one does.
    y = simulate_arima(N_TRAIN + 100, ar=[0.8], mean=10.0, seed=21)
    model = fit(y[:N_TRAIN], ModelSpec.ar(1))
    stream = model.stream()
    outlier_at = N_TRAIN + 40
    y_obs = y.copy()
    y_obs[outlier_at] += 15.0
    steps = [stream.update(v, absorb=(i != outlier_at)) for i, v in enumerate(y_obs[N_TRAIN:], start=N_TRAIN)]
    y_ref = y_obs.copy()
    y_ref[outlier_at] = np.nan
    ref = batch_filter(y_ref, model)
    error = np.array([s.error for s in steps])
    keep = np.arange(N_TRAIN, N_TRAIN + 100) != outlier_at
    ref_sd = np.sqrt(ref.forecasts_error_cov[0, 0, N_TRAIN:])
    assert max_relative_difference(error[keep], ref.forecasts_error[0, N_TRAIN:][keep], scale=ref_sd[keep]) <= RTOL
    spike = steps[outlier_at - N_TRAIN]
    assert spike.z > 10 and not spike.absorbed
    # peek() scores exactly like update() without moving anything.
    before = stream.state
    peeked = stream.peek(11.0)
    assert np.array_equal(before, stream.state)
    assert peeked.error == pytest.approx(stream.update(11.0).error, rel=1e-15)


def test_forecast_matches_statsmodels_get_forecast():
    # Reference: statsmodels results.get_forecast(h) (mean and variance).
    from statsmodels.tsa.statespace.sarimax import SARIMAX

    y = simulate_arima(N_TRAIN, ar=[0.5, -0.2], ma=[0.3, 0.2], d=1, drift=0.05, seed=31)
    model = fit(y, ModelSpec.arima(2, 1, 2, drift=True))
    ref_model = SARIMAX(y, order=(2, 1, 2), trend="c")
    ref = ref_model.filter(np.array([model.params[n] for n in ref_model.param_names])).get_forecast(24)
    mean, variance = model.stream().forecast(24)
    assert max_relative_difference(mean, ref.predicted_mean) <= RTOL
    assert max_relative_difference(variance, ref.var_pred_mean) <= RTOL


def test_bank_equals_streams_with_gaps():
    specs = [ModelSpec.arima(2, 1, 2, drift=True), ModelSpec.arma(2, 2)]
    series = [simulate_arima(N_TRAIN + 200, ar=[0.5, -0.2], ma=[0.3, 0.2], d=1, drift=0.05, seed=41),
              simulate_arima(N_TRAIN + 200, ar=[0.5, -0.25], ma=[0.4, 0.2], mean=3.0, seed=42)]
    models = [fit(s[:N_TRAIN], spec) for s, spec in zip(series, specs)]
    assert {m.system.k_states for m in models} == {4} or len({m.system.k_states for m in models}) == 2
    same_k = [m for m in models if m.system.k_states == models[0].system.k_states]
    streams = [m.stream() for m in same_k for _ in range(3)]
    grid = np.stack([series[0][N_TRAIN:]] * 3 + ([series[1][N_TRAIN:]] * 3 if len(same_k) == 2 else []), axis=1)
    grid[20, 0] = np.nan
    grid[50:60, 1] = np.nan
    bank = StreamBank([m.stream() for m in same_k for _ in range(3)])
    for row in grid:
        step = bank.update(row)
        singles = [s.update(v) for s, v in zip(streams, row)]
        np.testing.assert_allclose(step.variance, [s.variance for s in singles], rtol=1e-12)
        np.testing.assert_allclose(step.error, [s.error for s in singles], rtol=1e-10, equal_nan=True)
    assert bank.nbytes_per_series < 1024
    back = bank.to_streams()
    assert back[0].step == streams[0].step
    np.testing.assert_allclose(back[1].state, streams[1].state, rtol=1e-12)
