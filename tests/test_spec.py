"""ModelSpec validation and names."""

import pytest

from leadline.detector.errors import SpecError
from leadline.detector.spec import MAX_SEASONAL_PERIOD, ModelSpec


@pytest.mark.parametrize("kwargs, message", [
    (dict(order=(-1, 0, 0)), "order p must be >= 0"),
    (dict(order=(0, 3, 0)), "order d must be <= 2"),
    (dict(order=(1, 0)), r"order must be \(p, d, q\)"),
    (dict(order=(1.5, 0, 0)), "order p must be an integer"),
    (dict(order=(0, 2, 1), trend="c"), "use trend='n' when d \\+ D >= 2"),
    (dict(order=(0, 1, 1), seasonal=(0, 1, 1, 12), trend="c"), "d \\+ D >= 2"),
    (dict(order=(1, 0, 0), trend="x"), "trend must be one of"),
    (dict(order=(1, 0, 0), seasonal=(0, 1, 1, 96)), "Use calendar terms"),
    (dict(order=(1, 0, 0), seasonal=(0, 0, 0, 12)), "no seasonal part"),
    (dict(order=(1, 0, 0), seasonal=(0, 2, 0, 12)), "seasonal D must be <= 1"),
])
def test_bad_specs_are_refused_with_a_clear_message(kwargs, message):
    with pytest.raises(SpecError, match=message):
        ModelSpec(**kwargs)


def test_the_seasonal_bound_is_documented_and_enforced():
    ModelSpec((1, 0, 0), (0, 1, 1, MAX_SEASONAL_PERIOD))
    with pytest.raises(SpecError, match="above 24"):
        ModelSpec((1, 0, 0), (0, 1, 1, MAX_SEASONAL_PERIOD + 1))


@pytest.mark.parametrize("spec, label", [
    (ModelSpec.white_noise(), "white noise + const"),
    (ModelSpec.ar(2), "AR(2) + const"),
    (ModelSpec.ma(1, constant=False), "MA(1)"),
    (ModelSpec.arma(2, 2), "ARMA(2,2) + const"),
    (ModelSpec.arima(1, 1, 1), "ARIMA(1,1,1)"),
    (ModelSpec.arima(2, 1, 2, drift=True), "ARIMA(2,1,2) + drift"),
    (ModelSpec((0, 1, 1), (0, 1, 1, 12)), "SARIMA(0,1,1)(0,1,1)_12"),
])
def test_families_are_named_for_what_they_are(spec, label):
    assert spec.label == label


def test_default_trend_depends_on_differencing_and_round_trips():
    assert ModelSpec((1, 0, 0)).trend == "c"
    assert ModelSpec((1, 1, 0)).trend == "n"
    spec = ModelSpec.parse("2,1,2", None, "c")
    assert ModelSpec.from_dict(spec.to_dict()) == spec
    with pytest.raises(SpecError, match="3 comma-separated integers"):
        ModelSpec.parse("2,1")
