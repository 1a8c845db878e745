"""SenML resolution checked against the examples of RFC 8428 section 5.

Every expected name, unit, value and time below is the RFC's own: the
resolved form printed in section 5.1.4, or the times the text of sections
5.1.2 and 5.1.6 states. Negative cases follow the rules of section 4.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from leadline.adapters.sources.senml import RELATIVE_TIME_LIMIT_S, SenmlPayload
from leadline.detector.errors import RejectError

NOW_S = 1_714_536_900.0  # arrival time used as "now"
UTC = timezone.utc


def resolve(pack, now_s=NOW_S, **options):
    return SenmlPayload(**options).parse(json.dumps(pack).encode(), now_s)


def epoch(seconds: float) -> datetime:
    return datetime.fromtimestamp(seconds, UTC)


def close_in_time(a: datetime, b: datetime, tol_s: float = 1e-6) -> bool:
    return abs((a - b).total_seconds()) <= tol_s


def test_rfc8428_5_1_1_single_data_point_is_now():
    # RFC 8428 section 5.1.1: one record, no time -> time 0 = "now" (section 4.5.3).
    result = resolve([{"n": "urn:dev:ow:10e2073a01080063", "u": "Cel", "v": 23.1}])
    assert result.rejects == []
    (value,) = result.values
    assert value.name == "urn:dev:ow:10e2073a01080063"
    assert value.unit == "Cel" and value.value == 23.1
    assert close_in_time(value.timestamp, epoch(NOW_S))


def test_rfc8428_5_1_2_base_name_is_prepended():
    # RFC 8428 section 5.1.2, first example: voltage and current "now".
    pack = [
        {"bn": "urn:dev:ow:10e2073a01080063:", "n": "voltage", "u": "V", "v": 120.1},
        {"n": "current", "u": "A", "v": 1.2},
    ]
    values = resolve(pack).values
    assert [(v.name, v.unit, v.value) for v in values] == [
        ("urn:dev:ow:10e2073a01080063:voltage", "V", 120.1),
        ("urn:dev:ow:10e2073a01080063:current", "A", 1.2),
    ]
    assert all(close_in_time(v.timestamp, epoch(NOW_S)) for v in values)


def test_rfc8428_5_1_2_base_time_relative_times_and_base_unit():
    # RFC 8428 section 5.1.2, second example: bt = 1.276020076001e+09 is
    # "Tue Jun 8 18:01:16.001 UTC 2010"; currents at each second for the
    # previous 5 seconds; unit A from bu; bver 5 is not above 10 (section 4.4).
    pack = [
        {"bn": "urn:dev:ow:10e2073a0108006:", "bt": 1.276020076001e09, "bu": "A", "bver": 5,
         "n": "voltage", "u": "V", "v": 120.1},
        {"n": "current", "t": -5, "v": 1.2},
        {"n": "current", "t": -4, "v": 1.3},
        {"n": "current", "t": -3, "v": 1.4},
        {"n": "current", "t": -2, "v": 1.5},
        {"n": "current", "t": -1, "v": 1.6},
        {"n": "current", "v": 1.7},
    ]
    values = resolve(pack).values
    assert values[0].name == "urn:dev:ow:10e2073a0108006:voltage" and values[0].unit == "V"
    assert close_in_time(values[0].timestamp, datetime(2010, 6, 8, 18, 1, 16, 1000, tzinfo=UTC))
    currents = values[1:]
    assert [v.value for v in currents] == [1.2, 1.3, 1.4, 1.5, 1.6, 1.7]
    assert {v.unit for v in currents} == {"A"}
    assert {v.name for v in currents} == {"urn:dev:ow:10e2073a0108006:current"}
    for k, v in enumerate(currents):
        # RFC 8428 section 5.1.2, second example: bt = 1.276020076001e+09 and t = -5 .. 0
        # resolve to 1276020071.001 ... 1276020076.001
        assert close_in_time(v.timestamp, epoch(1276020071.001 + k))


RFC_5_1_3 = [
    {"bn": "urn:dev:ow:10e2073a01080063", "bt": 1.320067464e09, "bu": "%RH", "v": 20},
    {"u": "lon", "v": 24.30621},
    {"u": "lat", "v": 60.07965},
    {"t": 60, "v": 20.3},
    {"u": "lon", "t": 60, "v": 24.30622},
    {"u": "lat", "t": 60, "v": 60.07965},
    {"t": 120, "v": 20.7},
    {"u": "lon", "t": 120, "v": 24.30623},
    {"u": "lat", "t": 120, "v": 60.07966},
    {"u": "%EL", "t": 150, "v": 98},
    {"t": 180, "v": 21.2},
    {"u": "lon", "t": 180, "v": 24.30628},
    {"u": "lat", "t": 180, "v": 60.07967},
]

# RFC 8428 section 5.1.4: the resolved form of the section 5.1.3 pack.
RFC_5_1_4 = [
    ("%RH", 1.320067464e09, 20), ("lon", 1.320067464e09, 24.30621), ("lat", 1.320067464e09, 60.07965),
    ("%RH", 1.320067524e09, 20.3), ("lon", 1.320067524e09, 24.30622), ("lat", 1.320067524e09, 60.07965),
    ("%RH", 1.320067584e09, 20.7), ("lon", 1.320067584e09, 24.30623), ("lat", 1.320067584e09, 60.07966),
    ("%EL", 1.320067614e09, 98),
    ("%RH", 1.320067644e09, 21.2), ("lon", 1.320067644e09, 24.30628), ("lat", 1.320067644e09, 60.07967),
]


def test_rfc8428_5_1_3_resolves_to_the_5_1_4_records():
    values = resolve(RFC_5_1_3).values
    assert len(values) == len(RFC_5_1_4)
    for value, (unit, t, v) in zip(values, RFC_5_1_4):
        assert value.name == "urn:dev:ow:10e2073a01080063"
        assert value.unit == unit and value.value == v
        assert close_in_time(value.timestamp, epoch(t))


def test_rfc8428_5_1_5_non_numeric_records_are_rejected_one_by_one():
    # RFC 8428 section 5.1.5: the temperature is numeric; vs, vb and vd are not.
    pack = [
        {"bn": "urn:dev:ow:10e2073a01080063:", "n": "temp", "u": "Cel", "v": 23.1},
        {"n": "label", "vs": "Machine Room"},
        {"n": "open", "vb": False},
        {"n": "nfv-reader", "vd": "aGkgCg"},
    ]
    result = resolve(pack)
    assert [(v.name, v.value) for v in result.values] == [("urn:dev:ow:10e2073a01080063:temp", 23.1)]
    assert [r.reason for r in result.rejects] == ["non_numeric"] * 3
    assert "'vs'" in result.rejects[0].detail


def test_rfc8428_5_1_6_base_name_changes_and_base_time_stays():
    # RFC 8428 section 5.1.6: "the last record would use the Base Name from the
    # 3rd record but the Base Time from the first record".
    pack = [
        {"bn": "2001:db8::2/", "bt": 1.320078429e09, "n": "temperature", "u": "Cel", "v": 25.2},
        {"n": "humidity", "u": "%RH", "v": 30},
        {"bn": "2001:db8::1/", "n": "temperature", "u": "Cel", "v": 12.3},
        {"n": "humidity", "u": "%RH", "v": 67},
    ]
    values = resolve(pack).values
    assert [(v.name, v.value) for v in values] == [
        ("2001:db8::2/temperature", 25.2), ("2001:db8::2/humidity", 30),
        ("2001:db8::1/temperature", 12.3), ("2001:db8::1/humidity", 67),
    ]
    assert all(close_in_time(v.timestamp, epoch(1.320078429e09)) for v in values)


def test_rfc8428_5_1_7_base_only_record_and_positive_relative_time():
    # RFC 8428 section 5.1.7: a first record holding only bn; then values "now".
    pack = [
        {"bn": "urn:dev:ow:10e2073a01080063:"},
        {"n": "temp", "u": "Cel", "v": 23.1},
        {"n": "heat", "u": "/", "v": 1},
        {"n": "fan", "u": "/", "v": 0},
    ]
    values = resolve(pack).values
    assert [v.name.rsplit(":", 1)[1] for v in values] == ["temp", "heat", "fan"]
    # Section 5.1.7, last example: absolute bt plus t = 0.1 is 100 ms later.
    pack = [
        {"bt": 1.320078429e09, "bu": "/", "n": "2001:db8::3", "v": 0.5},
        {"n": "2001:db8::3", "t": 0.1, "v": 0},
    ]
    first, second = resolve(pack).values
    assert close_in_time(second.timestamp, epoch(1.320078429e09 + 0.1))
    assert second.unit == "/"


def test_times_below_2_pow_28_are_relative_to_now():
    # RFC 8428 section 4.5.3: values below 2**28 are relative to "now".
    values = resolve([{"n": "a", "t": -60, "v": 1}, {"n": "a", "bt": RELATIVE_TIME_LIMIT_S - 1, "v": 2},
                      {"n": "a", "bt": RELATIVE_TIME_LIMIT_S, "t": 0, "v": 3}]).values
    assert close_in_time(values[0].timestamp, epoch(NOW_S - 60))
    assert close_in_time(values[1].timestamp, epoch(NOW_S + RELATIVE_TIME_LIMIT_S - 1))
    # Exactly 2**28 is absolute: 1978-07-04 21:24:16 UTC (section 4.5.3).
    assert values[2].timestamp == datetime(1978, 7, 4, 21, 24, 16, tzinfo=UTC)


def test_base_value_and_value_are_summed():
    # RFC 8428 section 4.5.4: a missing base value or value counts as 0.
    values = resolve([{"n": "m", "bv": 100.0, "v": 2.5}, {"n": "m", "t": 1e9, "v": 1}, {"n": "m", "t": 1.1e9}]).values
    assert [v.value for v in values] == [102.5, 101.0, 100.0]


def test_use_sum_reads_base_sum_plus_sum():
    values = resolve([{"n": "reg", "bs": 1000.0, "s": 12.5}], use_sum=True).values
    assert [v.value for v in values] == [1012.5]
    result = resolve([{"n": "reg", "s": 12.5}])
    assert [r.reason for r in result.rejects] == ["missing_value"]


def test_field_ending_in_underscore_rejects_the_pack():
    # RFC 8428 section 4.4: unknown fields ending in '_' MUST give an error.
    with pytest.raises(RejectError, match="ends in '_'") as info:
        resolve([{"n": "a", "v": 1}, {"n": "b", "v": 2, "custom_": 1}])
    assert info.value.reason == "unknown_mandatory_field"
    # ... while other unknown fields are ignored.
    assert [v.value for v in resolve([{"n": "a", "v": 1, "custom": 7}]).values] == [1]


def test_higher_version_rejects_the_pack():
    # RFC 8428 section 4.4: a version above the one understood MUST NOT be used.
    with pytest.raises(RejectError) as info:
        resolve([{"bver": 11, "n": "a", "v": 1}])
    assert info.value.reason == "unsupported_version"
    with pytest.raises(RejectError, match="same version") as info:
        resolve([{"bver": 10, "n": "a", "v": 1}, {"bver": 9, "n": "a", "v": 2}])
    assert info.value.reason == "bad_version"
    with pytest.raises(RejectError, match="positive integer"):
        resolve([{"bver": 2.5, "n": "a", "v": 1}])


@pytest.mark.parametrize("name", ["-leading-dash", "has space", "", "ümlaut"])
def test_bad_names_are_rejected_per_record(name):
    # RFC 8428 section 4.5.1: allowed characters and the first character.
    result = resolve([{"n": name, "v": 1}, {"n": "ok", "v": 2}])
    assert [r.reason for r in result.rejects] == ["bad_name"]
    assert [v.name for v in result.values] == ["ok"]


@pytest.mark.parametrize(
    ("payload", "reason"),
    [
        (b'{"n": "a", "v": 1}', "not_senml"),
        (b"[1, 2]", "not_senml"),
        (b'[{"n": "a", "v": "1"}]', "not_senml"),
        (b'[{"n": 5, "v": 1}]', "not_senml"),
        (b'[{"n": "a", "v": true}]', "not_senml"),
        (b'[{"n": "a", "v": 1e999}]', "not_senml"),
        (b"[{", "not_json"),
        (b"\xc3\x28", "bad_utf8"),
    ],
)
def test_malformed_packs(payload, reason):
    with pytest.raises(RejectError) as info:
        SenmlPayload().parse(payload, NOW_S)
    assert info.value.reason == reason


def test_empty_pack_gives_nothing():
    assert resolve([]).values == []


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.binary(max_size=300))
def test_fuzz_random_bytes_raise_only_reject_errors(payload):
    try:
        result = SenmlPayload().parse(payload, NOW_S)
    except RejectError:
        return
    for value in result.values:
        assert math.isfinite(value.value)


records = st.dictionaries(
    st.sampled_from(["bn", "bt", "bu", "bv", "bs", "bver", "n", "u", "v", "vs", "vb", "vd", "s", "t", "ut", "x_", "x"]),
    st.none() | st.booleans() | st.integers(-(2**60), 2**60) | st.floats(allow_nan=False)
    | st.text(alphabet="abc:/-_. 1", max_size=8),
    max_size=6,
)


@settings(max_examples=400, deadline=None, derandomize=True)
@given(st.lists(records, max_size=6))
def test_fuzz_structured_packs_raise_only_reject_errors(pack):
    try:
        result = resolve(pack)
    except RejectError:
        return
    for value in result.values:
        assert math.isfinite(value.value)
        assert value.timestamp.tzinfo is not None
