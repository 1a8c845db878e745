"""Payload parsers: plain numbers and JSON with paths; every bad payload a RejectError."""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from leadline.adapters.sources.payloads import JsonPayload, NumberPayload
from leadline.detector.errors import ConfigError, RejectError

NOW_S = 1_714_536_900.0  # 2024-05-01T04:15:00Z


def test_plain_number():
    (value,) = NumberPayload().parse(b" 12.5\n", NOW_S).values
    assert value.value == 12.5 and value.timestamp is None


@pytest.mark.parametrize(
    ("payload", "reason"),
    [
        (b"abc", "non_numeric"),
        (b"", "non_numeric"),
        (b"1_000", "non_numeric"),
        (b"nan", "not_finite"),
        (b"-Infinity", "not_finite"),
        (b"\xff\xfe1", "bad_utf8"),
    ],
)
def test_plain_number_rejects(payload, reason):
    with pytest.raises(RejectError) as info:
        NumberPayload().parse(payload, NOW_S)
    assert info.value.reason == reason


def test_oversized_payload_is_rejected_before_decoding():
    with pytest.raises(RejectError, match="at most 16 bytes") as info:
        NumberPayload(max_bytes=16).parse(b"1" * 17, NOW_S)
    assert info.value.reason == "oversized"


def test_json_value_and_iso_time_paths():
    parser = JsonPayload(value_path="data.flow", time_path="data.at")
    payload = json.dumps({"data": {"flow": 3.25, "at": "2024-05-01T06:15:00+02:00"}}).encode()
    (value,) = parser.parse(payload, NOW_S).values
    assert value.value == 3.25
    assert value.timestamp == datetime(2024, 5, 1, 4, 15, tzinfo=timezone.utc)


def test_json_list_index_and_epoch_ms():
    parser = JsonPayload(value_path="readings.1.v", time_path=["meta", "t.ms"], time_format="epoch_ms")
    payload = json.dumps({"readings": [{"v": 1}, {"v": "7.5"}], "meta": {"t.ms": 1714536900123}}).encode()
    (value,) = parser.parse(payload, NOW_S).values
    assert value.value == 7.5
    assert value.timestamp == datetime(2024, 5, 1, 4, 15, 0, 123000, tzinfo=timezone.utc)


def test_json_null_value_is_a_missing_reading():
    (value,) = JsonPayload().parse(b'{"value": null}', NOW_S).values
    assert math.isnan(value.value)


@pytest.mark.parametrize(
    ("payload", "reason", "message"),
    [
        (b"{not json", "not_json", "not JSON"),
        (b'{"value": NaN}', "not_json", "not JSON"),
        (b'{"other": 1}', "missing_field", "key 'value' is missing"),
        (b'{"value": true}', "non_numeric", "expected a number"),
        (b'{"value": "high"}', "non_numeric", "expected a number"),
        (b'{"value": 1e400}', "not_finite", "finite"),
        (b"[1, 2]", "missing_field", "expected an object"),
        (b"[" * 60_000, "not_json", "not JSON"),  # deeper than the recursion limit
    ],
)
def test_json_rejects_name_reason_and_expectation(payload, reason, message):
    with pytest.raises(RejectError, match=message) as info:
        JsonPayload().parse(payload, NOW_S)
    assert info.value.reason == reason


@pytest.mark.parametrize(
    ("payload", "message"),
    [
        (b'{"value": 1, "t": "2024-05-01T06:15:00"}', "no UTC offset"),
        (b'{"value": 1, "t": "yesterday"}', "ISO 8601"),
        (b'{"value": 1, "t": [1]}', "ISO 8601 text or epoch number"),
        (b'{"value": 1, "t": 1e300}', "outside the datetime range"),
    ],
)
def test_json_time_rejects(payload, message):
    with pytest.raises(RejectError, match=message) as info:
        JsonPayload(time_path="t").parse(payload, NOW_S)
    assert info.value.reason == "bad_time"


def test_json_missing_time_field():
    with pytest.raises(RejectError, match="key 't' is missing") as info:
        JsonPayload(time_path="t").parse(b'{"value": 1}', NOW_S)
    assert info.value.reason == "missing_field"


def test_json_local_time_in_configured_zone():
    parser = JsonPayload(time_path="t", time_zone="Europe/Berlin")
    (value,) = parser.parse(b'{"value": 2, "t": "2024-05-01T06:15:00"}', NOW_S).values
    assert value.timestamp == datetime(2024, 5, 1, 4, 15, tzinfo=timezone.utc)  # CEST = UTC+2


def test_bad_json_paths_are_config_errors():
    with pytest.raises(ConfigError, match="dotted path"):
        JsonPayload(value_path="a..b")
    with pytest.raises(ConfigError, match="time_format"):
        JsonPayload(time_format="epoch_us")


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.binary(max_size=300))
def test_fuzz_json_and_number_parsers_raise_only_reject_errors(payload):
    for parser in (JsonPayload(time_path="t"), JsonPayload(value_path="a.0.b"), NumberPayload(max_bytes=200)):
        try:
            result = parser.parse(payload, NOW_S)
        except RejectError:
            continue
        for value in result.values:
            assert math.isnan(value.value) or math.isfinite(value.value)


json_values = st.recursive(
    st.none() | st.booleans() | st.floats(allow_nan=False) | st.integers() | st.text(max_size=10),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.sampled_from(["value", "t", "a", "b", "0"]), children, max_size=4),
    max_leaves=12,
)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(json_values)
def test_fuzz_structured_json_raises_only_reject_errors(document):
    payload = json.dumps(document).encode()
    for parser in (JsonPayload(time_path="t"), JsonPayload(value_path="a.0.b", time_path="t", time_format="epoch_ms")):
        try:
            parser.parse(payload, NOW_S)
        except RejectError:
            pass
