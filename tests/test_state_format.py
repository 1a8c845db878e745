"""Saved stream state: round trip, and clear refusals of bad bytes."""

import struct

import numpy as np
import pytest

from leadline.detector.errors import StateFormatError
from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import STATE_FORMAT_VERSION, Stream


@pytest.fixture(scope="module")
def stream():
    model = fit(simulate_arima(300, ar=[0.5], mean=2.0, seed=4), ModelSpec.ar(1))
    s = model.stream(model_version=7)
    s.shift_level(0.25)
    return s


def test_round_trip_keeps_everything(stream):
    back = Stream.from_bytes(stream.to_bytes())
    assert back.model_version == 7 and back.step == stream.step and back.level_offset == 0.25
    np.testing.assert_array_equal(back.state, stream.state)
    np.testing.assert_array_equal(back.cov, stream.cov)
    assert back.meta["label"] == "AR(1) + const"
    assert back.peek(2.0).forecast == stream.peek(2.0).forecast


def test_bad_bytes_are_refused(stream):
    data = stream.to_bytes()
    with pytest.raises(StateFormatError, match="bad magic"):
        Stream.from_bytes(b"not a state at all")
    newer = data[:8] + struct.pack("<H", STATE_FORMAT_VERSION + 1) + data[10:]
    with pytest.raises(StateFormatError, match=f"format version {STATE_FORMAT_VERSION + 1} is not supported"):
        Stream.from_bytes(newer)
    with pytest.raises(StateFormatError, match="corrupt"):
        Stream.from_bytes(data[:-40])
