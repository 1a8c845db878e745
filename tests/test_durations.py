"""Durations as text, both ways."""

import pytest

from leadline.detector.durations import human_duration, parse_duration_s


@pytest.mark.parametrize("seconds, text", [
    (45, "45 s"), (60, "1 min"), (3599, "59 min"), (7500, "2 h 5 min"),
    (3 * 86400 + 17 * 60 + 10, "3 d 0 h 17 min"), (260230, "3 d 0 h 17 min"),
])
def test_human_duration(seconds, text):
    assert human_duration(seconds) == text


def test_parse_then_show():
    assert human_duration(parse_duration_s("8h")) == "8 h 0 min"
