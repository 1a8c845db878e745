"""Automatic order selection: KPSS for d, then a stepwise AICc search."""

import pytest
from statsmodels.tsa.statespace.sarimax import SARIMAX

from leadline.detector.fitting import fit
from leadline.detector.order_selection import choose_d
from leadline.detector.simulate import simulate_arima


def test_kpss_chooses_d_for_stationary_and_integrated_series():
    # KPSS (Kwiatkowski et al. 1992) rejects level stationarity for a random walk
    # and not for white noise; Hyndman & Khandakar (2008) difference while it rejects.
    assert choose_d(simulate_arima(800, ar=[0.3], seed=1))[0] == 0
    assert choose_d(simulate_arima(800, ar=[0.3], d=1, seed=2))[0] == 1
    assert choose_d(simulate_arima(800, ma=[0.2], d=2, seed=3))[0] == 2


@pytest.fixture(scope="module")
def ar2_auto():
    y = simulate_arima(800, ar=[0.6, -0.3], mean=5.0, seed=11)
    return y, fit(y, "auto")


def test_auto_returns_the_lowest_aicc_of_its_table(ar2_auto):
    y, model = ar2_auto
    table = model.selection.candidates
    ok = [c for c in table if c.status == "ok"]
    assert model.aicc == min(c.aicc for c in ok)
    assert model.selection.chosen == model.spec
    assert "lowest AICc" in model.selection.reason and "KPSS" in model.selection.reason
    assert model.spec.order[1] == 0 and model.spec.trend == "c"
    # The AR(2) that generated the data is in the table; its AICc is statsmodels' own.
    ar2 = next(c for c in table if c.spec.order == (2, 0, 0) and c.spec.trend == "c")
    reference = SARIMAX(y, order=(2, 0, 0), trend="c").fit(disp=False)
    assert ar2.aicc == pytest.approx(reference.aicc, abs=1e-3)


def test_auto_search_is_bounded(ar2_auto):
    _, model = ar2_auto
    assert len(model.selection.candidates) <= 24
    assert all(c.spec.order[0] <= 4 and c.spec.order[2] <= 4 for c in model.selection.candidates)
    text = model.selection.table()
    assert text.splitlines()[1].startswith(model.spec.label)
