"""Fits that a feed's units cannot break: centred and scaled fits, white noise in closed form,
constant and quantized windows."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.tsa.statespace.sarimax import SARIMAX

from leadline.detector.estimation import decimal_resolution
from leadline.detector.fitting import fit
from leadline.detector.sarimax_estimator import fit_sarimax
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from reference import batch_filter, max_relative_difference


@pytest.fixture(scope="module")
def nile() -> np.ndarray:
    # statsmodels.datasets.nile: 100 annual flows of the Nile at Aswan, 1871-1970 (10^8 m^3).
    return sm.datasets.nile.load_pandas().data["volume"].to_numpy(float)


def test_scaled_fit_equals_statsmodels_unscaled_fit_on_the_nile(nile):
    model = fit(nile, ModelSpec.arima(0, 1, 1))
    reference = SARIMAX(nile, order=(0, 1, 1)).fit(disp=False)
    # statsmodels' own fit on the raw flows, a well-conditioned case: theta -0.7334 and
    # log-likelihood -632.538 (Durbin & Koopman 2012, section 2.10, the local level model as an
    # ARIMA(0,1,1); the same values in statsmodels' documentation of the Nile local level model).
    assert reference.params[0] == pytest.approx(-0.7334, abs=5e-4)
    assert reference.llf == pytest.approx(-632.538, abs=1e-3)
    assert model.params["ma.L1"] == pytest.approx(reference.params[0], abs=2e-3)
    assert model.sigma2 == pytest.approx(reference.params[1], rel=5e-3)
    assert model.loglik == pytest.approx(reference.llf, abs=1e-3)
    assert model.aicc == pytest.approx(reference.aicc, abs=1e-2)


def test_loglik_on_the_feed_scale_is_the_scaled_one_less_the_jacobian():
    # y = m + s u: log f_y = log f_u - log s per observation (change of variables), so over
    # the n slots of the likelihood log L_y = log L_u - n log s.
    y = simulate_arima(500, ar=[0.5], mean=20.0, seed=4)
    m, s = 20.0, 0.01
    spec = ModelSpec.ar(1)
    on_u = fit(y, spec)
    on_y = fit(m + s * y, spec)
    assert on_y.loglik == pytest.approx(on_u.loglik - y.size * math.log(s), abs=1e-4)
    assert on_y.params["ar.L1"] == pytest.approx(on_u.params["ar.L1"], abs=1e-5)
    assert on_y.sigma2 == pytest.approx(on_u.sigma2 * s * s, rel=1e-4)
    # mu_y = m + s mu_u, with intercept = (1 - phi) mu for an AR(1) with a constant.
    mu_u = on_u.params["intercept"] / (1 - on_u.params["ar.L1"])
    mu_y = on_y.params["intercept"] / (1 - on_y.params["ar.L1"])
    assert mu_y == pytest.approx(m + s * mu_u, rel=1e-6)


@pytest.mark.parametrize("level, spread", [(0.0268, 3e-4), (1e6, 10.0)], ids=["tiny", "huge"])
def test_any_scale_converges_and_streams_exactly(level, spread):
    # A vibration RMS of 0.0268 +- 3e-4 and a meter reading 1e6 +- 10 are the same AR(1).
    u = simulate_arima(1200, ar=[0.7], seed=21)
    y = level + spread * u
    model = fit(y[:1000], ModelSpec.ar(1))
    assert model.converged and model.sigma2 > 0
    assert model.params["ar.L1"] == pytest.approx(fit(u[:1000], ModelSpec.ar(1)).params["ar.L1"], abs=1e-4)
    assert math.sqrt(model.sigma2) == pytest.approx(spread, rel=0.1)
    # The stream continues on the feed's own scale, equal to statsmodels' batch filter.
    stream = model.stream()
    steps = [stream.update(v) for v in y[1000:]]
    ref = batch_filter(y, model)
    assert max_relative_difference([s.forecast for s in steps], ref.forecasts[0, 1000:]) <= 1e-8
    assert max_relative_difference([s.z for s in steps], ref.standardized_forecasts_error[0, 1000:],
                                   scale=1.0) <= 1e-6


def test_huge_scale_fits_where_the_unscaled_optimiser_struggles():
    y = 1e6 + 10.0 * simulate_arima(1000, ar=[0.5], seed=1)
    model = fit(y, "auto")
    assert model.converged and not any("converge" in p for p in model.problems)
    assert model.spec.order[0] >= 1 and 60 < model.sigma2 < 160  # true sigma2 = 100


def test_white_noise_in_closed_form_equals_statsmodels():
    y = 5.0 + np.random.default_rng(1).normal(0.0, 2.0, 400)
    y[17] = np.nan
    model = fit(y, ModelSpec.white_noise())
    reference = SARIMAX(y, order=(0, 0, 0), trend="c").fit(disp=False)
    assert model.params["intercept"] == pytest.approx(reference.params[0], rel=1e-5)
    assert model.sigma2 == pytest.approx(reference.params[1], rel=1e-4)
    assert model.loglik == pytest.approx(reference.llf, abs=1e-5)
    assert model.aicc == pytest.approx(reference.aicc, abs=1e-4)
    ref = batch_filter(np.r_[y, 4.0, np.nan, 9.0], model)
    stream = model.stream()
    z = [stream.update(v).z for v in (4.0, np.nan, 9.0)]
    assert np.isnan(z[1])  # a missing reading is not scored (statsmodels writes 0 there)
    np.testing.assert_allclose([z[0], z[2]], ref.standardized_forecasts_error[0, [400, 402]], rtol=1e-10)


def test_white_noise_is_always_a_candidate_of_auto():
    y = np.cumsum(simulate_arima(600, seed=8))  # a random walk: d = 1
    model = fit(y, "auto")
    assert model.spec.order[1] == 1
    assert any(c.spec == ModelSpec.white_noise() for c in model.selection.candidates)


def test_constant_window_gets_white_noise_with_a_floor_and_a_problem():
    y = np.full(300, 20.25)
    model = fit(y, "auto")
    assert model.spec == ModelSpec.white_noise()
    # Resolution 0.01 from the decimals; the floor is the uniform quantization variance r^2/12.
    assert model.sigma2 == pytest.approx(0.01 ** 2 / 12)
    assert model.params["intercept"] == 20.25
    assert any(p.kind == "constant window" for p in model.advice) and model.is_poor
    assert "constant" in model.treatment
    assert model.stream().update(20.25).z == 0.0
    assert decimal_resolution(20.0) == 1.0 and decimal_resolution(0.0268) == pytest.approx(1e-4)


def test_constant_window_with_an_explicit_spec_is_still_fitted():
    model = fit(np.full(200, 7.0), ModelSpec.ar(2))
    assert model.spec == ModelSpec.white_noise() and model.sigma2 == pytest.approx(1 / 12)


def test_quantized_readings_get_a_variance_floor_from_their_step():
    # Integer readings with long repeats: a slow level that a counter rounds to whole units.
    rng = np.random.default_rng(5)
    level = 10 + np.cumsum(rng.normal(0, 0.02, 1500))
    y = np.round(level)
    assert np.unique(y).size <= 10
    model = fit(y, "auto")
    assert model.sigma2 >= 1 / 12 - 1e-12  # r = 1: Sheppard's r^2/12
    assert "quantized" in model.treatment
    z = model.stream().update(y[-1] + 1).z
    assert math.isfinite(z)


def test_fit_sarimax_still_fits_the_values_as_given():
    y = simulate_arima(300, ar=[0.4], seed=2)
    results, captured = fit_sarimax(y, ModelSpec.ar(1))
    assert results.params[1] == pytest.approx(0.4, abs=0.15) and isinstance(captured, list)


EPOCH = 1_780_000_000.0 + 900.0 * np.arange(800)
DAILY = CalendarTerms((SeasonalPeriod(86400.0, 2),))


@pytest.mark.parametrize("spec, values, calendar", [
    (ModelSpec.arima(1, 1, 0, drift=True),
     100 + simulate_arima(800, ar=[0.4], d=1, seed=2) + 0.05 * np.arange(800), None),
    (ModelSpec((1, 0, 0), trend="ct"), 30 + simulate_arima(800, ar=[0.5], seed=3) + 0.01 * np.arange(800), None),
    (ModelSpec((1, 0, 1)), 30 + simulate_arima(800, ar=[0.5], ma=[0.3], seed=4)
     + 2 * np.sin(2 * np.pi * EPOCH / 86400.0), DAILY),
], ids=["drift", "const+trend", "calendar"])
def test_mapped_estimates_equal_statsmodels_unscaled_fit(spec, values, calendar):
    # Reference: statsmodels' SARIMAX maximum likelihood on the raw values, well conditioned here.
    exog = calendar.design(EPOCH) if calendar is not None else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = SARIMAX(values, exog=exog, order=spec.order, trend=spec.trend).fit(disp=False)
    model = fit(values, spec, calendar=calendar, timestamps_epoch_s=EPOCH if calendar is not None else None)
    assert model.loglik >= reference.llf - 1e-3
    assert model.loglik == pytest.approx(reference.llf, abs=0.01)
    ours = np.array([model.params[name] for name in reference.model.param_names])
    np.testing.assert_allclose(ours, reference.params, rtol=0.02, atol=0.01 * np.abs(reference.params).max())
