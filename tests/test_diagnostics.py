"""The package's one Ljung-Box test against statsmodels' ``acorr_ljungbox``.

Reference: statsmodels.stats.diagnostic.acorr_ljungbox (Ljung & Box 1978,
Biometrika 65), on statsmodels' bundled Nile and sunspots data sets and on
a seeded AR(1) series, at several lags, with and without fitted ARMA terms
(``model_df``), and on the standardized residuals of a fit.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.datasets import nile, sunspots
from statsmodels.stats.diagnostic import acorr_ljungbox

from leadline.detector.diagnostics import ljung_box_pvalue
from leadline.detector.fitting import fit
from leadline.detector.spec import ModelSpec
from engine_helpers import ar1


def _series() -> dict[str, np.ndarray]:
    return {
        "nile": nile.load_pandas().data["volume"].to_numpy(dtype=float),  # statsmodels' bundled Nile flow
        "sunspots": sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(dtype=float),  # bundled yearly sunspots
        "ar1": ar1(240, seed=41, phi=0.2),
    }


@pytest.mark.parametrize("name", ["nile", "sunspots", "ar1"])
@pytest.mark.parametrize("lag, model_df", [(1, 0), (5, 0), (10, 0), (10, 2), (24, 3)])
def test_ljung_box_pvalue_equals_statsmodels(name, lag, model_df):
    x = _series()[name]
    table = acorr_ljungbox(x, lags=[lag], model_df=model_df)  # statsmodels as the reference
    reference = float(table["lb_pvalue"].iloc[0])
    assert ljung_box_pvalue(x, lag, model_df) == pytest.approx(reference, rel=1e-9, abs=1e-300)


def test_ljung_box_pvalue_on_fit_residuals_equals_statsmodels():
    # the residuals fitting.py tests: an ARMA(1,1) on the Nile, two fitted ARMA terms
    y = nile.load_pandas().data["volume"].to_numpy(dtype=float)
    z = fit(y, ModelSpec.parse("1,0,1")).standardized_residuals
    reference = float(acorr_ljungbox(z, lags=[10], model_df=2)["lb_pvalue"].iloc[0])
    assert ljung_box_pvalue(z, 10, 2) == pytest.approx(reference, rel=1e-9)


def test_ljung_box_pvalue_is_nan_where_the_test_is_undefined():
    x = ar1(240, seed=41, phi=0.2)
    # no degrees of freedom left: statsmodels gives NaN too
    assert math.isnan(float(acorr_ljungbox(x, lags=[3], model_df=3)["lb_pvalue"].iloc[0]))
    assert math.isnan(ljung_box_pvalue(x, 3, 3))
    assert math.isnan(ljung_box_pvalue(x[:11], 10))  # no more than lag + 1 values
    assert math.isnan(ljung_box_pvalue(np.full(50, 2.5), 10))  # constant: no autocorrelation defined
