"""No error of a dependency escapes a public entry point untranslated.

Each check drives a public entry point with bad input that reaches a
dependency (sqlalchemy and the database drivers, paho-mqtt, statsmodels,
numpy, json and tomllib) and requires one of leadline's own errors
(:mod:`leadline.detector.errors`), chained with ``raise ... from exc`` where a
library error was the cause, so that a caller needs to catch only ours.
The core's value objects (``Reading``, ``AlarmEvent``, ``Stream``) are held
to the same rule for their own checks.
"""

from __future__ import annotations

import json
import socket
import struct
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from leadline.adapters.config import load_config
from leadline.adapters.sinks.alarm_publisher import MqttAlarmPublisher
from leadline.adapters.sources.mqtt_connection import MqttSettings, build_client, connect_async
from leadline.adapters.store.eventstore import open_store, upgrade_store
from leadline.detector import (
    AlarmEvent,
    ConfigError,
    DataError,
    Engine,
    FeedSettings,
    FitError,
    LeadlineError,
    ModelSpec,
    ParameterError,
    Reading,
    StateFormatError,
    StoreError,
    Stream,
    fit,
)
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima

UTC = timezone.utc
T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC)


def closed_loopback_port() -> int:
    """A loopback port nothing listens on (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# ------------------------------------------------------------ event store
@pytest.mark.parametrize("make_url, library_cause", [
    (lambda tmp: str(tmp), True),                                   # a directory, as a plain path
    (lambda tmp: f"sqlite:///{tmp}", True),                         # a directory, as a URL
    (lambda tmp: f"sqlite:///{tmp}/no/such/folder/events.db", True),
    (lambda tmp: "postgresql+psycopg://leadline@127.0.0.1:notaport/events", True),
    (lambda tmp: f"postgresql+psycopg://leadline@127.0.0.1:{closed_loopback_port()}/events", True),
    (lambda tmp: "postgresql+nosuchdriver://leadline@127.0.0.1/events", True),
    (lambda tmp: "mysql://leadline@127.0.0.1/events", False),       # refused by leadline itself
], ids=["directory", "directory-url", "missing-folder", "bad-port", "unreachable-server", "unknown-driver",
        "unsupported-backend"])
def test_open_store_on_a_bad_url_raises_store_error(tmp_path, make_url, library_cause):
    with pytest.raises(StoreError) as info:
        open_store(make_url(tmp_path))
    if library_cause:
        assert info.value.__cause__ is not None, "the library error must be chained (raise ... from exc)"


def test_open_store_on_a_file_that_is_not_a_database(tmp_path):
    path = tmp_path / "events.db"
    path.write_bytes(b"Marrowby pumping log, not a database\n" * 200)
    with pytest.raises(StoreError, match="not a database") as info:
        open_store(str(path))
    assert info.value.__cause__ is not None


def test_upgrade_store_on_a_directory(tmp_path):
    with pytest.raises(StoreError):
        upgrade_store(str(tmp_path))


def test_store_refuses_an_event_whose_parameters_json_cannot_hold(tmp_path):
    event = AlarmEvent("hollins/level/t1", "spike", "alarm", T0, parameters={"limit": object()})
    with open_store(str(tmp_path / "events.db")) as store:
        with pytest.raises(StoreError, match="JSON") as info:
            store.stage_event(event)
    assert isinstance(info.value.__cause__, TypeError)


# ------------------------------------------------------------ fitting (statsmodels, numpy)
def test_fit_on_a_model_statsmodels_rejects_raises_fit_error():
    y = simulate_arima(200, ar=[0.5], seed=11)
    # AR lag 2 in both parts: statsmodels' SARIMAX refuses the model with a ValueError.
    with pytest.raises(FitError, match="statsmodels could not fit") as info:
        fit(y, ModelSpec(order=(2, 0, 0), seasonal=(1, 0, 0, 2), trend="c"))
    assert isinstance(info.value.__cause__, ValueError)


@pytest.mark.parametrize("values, error", [
    (["12.5", "no reading"] * 30, DataError),       # numpy cannot convert
    ({"flow": 1.0}, DataError),
    (np.ones((20, 3)), DataError),
    ([1.0, np.inf] * 30, DataError),
    ([np.nan] * 60, FitError),                       # nothing for statsmodels to fit
])
def test_fit_on_bad_values_raises_our_errors(values, error):
    with pytest.raises(error):
        fit(values, ModelSpec.ar(1))


def test_auto_fit_on_a_constant_series_is_a_stated_white_noise_not_a_dependency_error():
    # statsmodels' kpss raises a plain ValueError on a constant series; "auto" must not let it out
    model = fit([4.0] * 80, "auto")
    assert model.spec.label.startswith("white noise") and model.sigma2 > 0
    assert any("every reading of the training window is 4" in p for p in model.problems)


def test_fit_with_calendar_terms_and_a_nan_timestamp_raises_our_error():
    y = simulate_arima(200, ar=[0.5], seed=12)
    epoch_s = 1_772_000_000 + 3600.0 * np.arange(200)
    epoch_s[5] = np.nan
    calendar = CalendarTerms(periods=(SeasonalPeriod(86400.0, 2),), weekend=True)
    with pytest.raises(LeadlineError):
        fit(y, ModelSpec.ar(1), calendar=calendar, timestamps_epoch_s=epoch_s)


# ------------------------------------------------------------ saved state (json, numpy's npz)
@pytest.fixture(scope="module")
def saved_state() -> bytes:
    model = fit(simulate_arima(300, ar=[0.5], mean=2.0, seed=4), ModelSpec.ar(1))
    return model.stream(model_version=3).to_bytes()


def with_header(data: bytes, change) -> bytes:
    """The same state with its JSON header edited by ``change``."""
    (header_len,) = struct.unpack_from("<I", data, 10)
    header = json.loads(data[14:14 + header_len])
    change(header)
    text = json.dumps(header).encode("utf-8")
    return data[:10] + struct.pack("<I", len(text)) + text + data[14 + header_len:]


@pytest.mark.parametrize("mangle", [
    lambda d: b"\x00\xff" * 40,                                         # garbage
    lambda d: d[:14] + b"\xff\xfe" + d[16:],                            # header not UTF-8
    lambda d: d[:14] + b"[" + d[15:],                                   # header not JSON
    lambda d: with_header(d, lambda h: h.pop("step")),                  # a key missing
    lambda d: with_header(d, lambda h: h.update(level=2.0)),            # a saved value out of range
    lambda d: with_header(d, lambda h: h.update(step="slot seven")),
    lambda d: with_header(d, lambda h: h.update(regression={"kind": "tide"})),
    lambda d: d[:-60],                                                  # the npz archive cut short
    lambda d: d[:len(d) - 200] + b"\x00" * 200,
], ids=["garbage", "not-utf8", "not-json", "missing-key", "level-out-of-range", "step-not-int",
        "unknown-regression", "truncated", "zeroed-tail"])
def test_stream_from_bytes_raises_state_format_error(saved_state, mangle):
    assert Stream.from_bytes(saved_state).model_version == 3  # the unmangled state loads
    with pytest.raises(StateFormatError):
        Stream.from_bytes(mangle(saved_state))


def test_engine_restore_of_garbage_raises_state_format_error():
    engine = Engine(lambda feed_id: FeedSettings())
    with pytest.raises(StateFormatError):
        engine.restore("hollins/level/t1", b"LLFEED" + b"\x00" * 64, 1)


# ------------------------------------------------------------ MQTT settings (paho-mqtt)
@pytest.mark.parametrize("changes, key", [
    ({"host": ""}, "host"),
    ({"host": None}, "host"),
    ({"host": 1883}, "host"),
    ({"keepalive_s": -1}, "keepalive_s"),
    ({"keepalive_s": "30"}, "keepalive_s"),
    ({"session_expiry_s": 2**32}, "session_expiry_s"),
    ({"receive_maximum": "many"}, "receive_maximum"),
    ({"client_id": "c" * 65536}, "client_id"),
    ({"port": 0}, "port"),
    ({"protocol": "3.1"}, "protocol"),
], ids=lambda v: str(v)[:30])
def test_bad_mqtt_settings_raise_config_error_before_paho_sees_them(changes, key):
    settings = {"client_id": "hollins-probe", "host": "127.0.0.1", "port": closed_loopback_port()} | changes
    with pytest.raises(ConfigError, match=f"mqtt.{key}"):
        MqttAlarmPublisher(MqttSettings(**settings)).start()


def test_paho_refusing_the_settings_is_translated_at_connect():
    # Settings made to slip past their own checks, so that paho-mqtt itself refuses them.
    settings = MqttSettings(client_id="hollins-probe", port=closed_loopback_port(), protocol="3.1.1")
    object.__setattr__(settings, "host", "")
    client = build_client(settings)  # no network until connect_async and loop_start
    with pytest.raises(ConfigError, match="paho-mqtt refused") as info:
        connect_async(client, settings)
    assert isinstance(info.value.__cause__, ValueError)


# ------------------------------------------------------------ config files (tomllib)
def test_malformed_toml_names_the_file_and_the_line(tmp_path):
    path = tmp_path / "marrowby.toml"
    path.write_text('[store]\nurl = "events.db"\n\n[feeds\ninterval = "15min"\n')
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert "marrowby.toml" in message and "line 4" in message
    assert info.value.__cause__ is not None


@pytest.mark.parametrize("content, expected", [
    (b'[store]\nurl = "\xff"\n', "not UTF-8"),
    (b'[store]\nurl = "a.db"\nurl = "b.db"\n', "line 3"),
])
def test_undecodable_config_raises_config_error(tmp_path, content, expected):
    path = tmp_path / "marrowby.toml"
    path.write_bytes(content)
    with pytest.raises(ConfigError, match=expected):
        load_config(path)


def test_unreadable_config_path_raises_config_error(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path)                    # a directory
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "absent.toml")


# ------------------------------------------------------------ the core's value objects
@pytest.mark.parametrize("timestamp", [datetime(2026, 3, 2, 6, 0), "2026-03-02T06:00Z", 1_772_431_200])
def test_reading_refuses_a_timestamp_that_is_not_an_aware_datetime(timestamp):
    with pytest.raises(DataError, match="hollins/flow/m2"):
        Reading("hollins/flow/m2", timestamp, 4.2)


def test_reading_keeps_converting_other_zones_to_utc():
    plus_two = timezone(timedelta(hours=2))
    reading = Reading("hollins/flow/m2", datetime(2026, 3, 2, 8, 0, tzinfo=plus_two), 4.2)
    assert reading.timestamp == T0 and reading.timestamp.utcoffset() == timedelta(0)


@pytest.mark.parametrize("changes, match", [
    ({"severity": "critical"}, "severity"),
    ({"start": datetime(2026, 3, 2, 6, 0)}, "start"),
    ({"start": "2026-03-02T06:00Z"}, "start"),
    ({"end": datetime(2026, 3, 2, 7, 0)}, "end"),
])
def test_alarm_event_refuses_bad_fields(changes, match):
    fields = {"feed_id": "hollins/level/t1", "rule": "spike", "severity": "alarm", "start": T0} | changes
    with pytest.raises(DataError, match=match):
        AlarmEvent(**fields)


def test_stream_argument_checks_raise_parameter_error(saved_state):
    stream = Stream.from_bytes(saved_state)
    with pytest.raises(ParameterError, match="level"):
        Stream(stream.system, stream.state, stream.cov, stream.step, level=1.0)
    with pytest.raises(ParameterError, match="horizon"):
        stream.forecast(0)
    with pytest.raises(ParameterError, match="finite"):
        stream.shift_level(float("nan"))


def test_errors_about_a_value_stay_value_errors():
    # Decided in leadline.detector.errors: the errors about one bad value are also
    # ValueErrors, so that `except ValueError` guards keep working.
    for cls in (DataError, ParameterError, StateFormatError, ConfigError):
        assert issubclass(cls, LeadlineError) and issubclass(cls, ValueError)
    for cls in (FitError, StoreError):
        assert issubclass(cls, LeadlineError) and not issubclass(cls, ValueError)
