"""The config file: a good one parses into the documented values; each kind of mistake is named.

External references used below: TOML 1.0 (toml.io/en/v1.0.0) for what tomllib gives (local dates,
arrays of tables, integers with underscores), the SI minute/hour/day for durations, the IANA tz
database names, and the signature of ``sigma_thresholds``/``budget_thresholds`` (the engine's own
argument names, which the ``limits`` table must follow).
"""

from __future__ import annotations

import inspect
import re
from datetime import date, time
from pathlib import Path

import pytest

from leadline.adapters.config import file as config_mod
from leadline.adapters.cli import main
from leadline.adapters.config import config_from_text, load_config
from leadline.adapters.config.feeds import BUDGET_LIMIT_KEYS, LIMIT_CHECKS, SIGMA_LIMIT_KEYS, BUILTIN_DEFAULTS
from leadline.detector.errors import ConfigError
from leadline.detector.rules.thresholds import budget_thresholds, sigma_thresholds

GOOD = """
[store]
url = "data/events.db"
flush_interval_s = 2.5
flush_events = 200

[[sources.csv]]
name = "pump-export"
path = "incoming/pumps-*.csv"
format = "wide"
delimiter = ";"
decimal = ","
time_format = "epoch_ms"
columns = { time = "ts", feeds = { "P1 bar" = "thornwick/pumps/p1/pressure" } }
from_start = true

[[sources.csv]]
name = "level-export"
path = "/srv/thornwick/levels.csv"
columns = { time = "when", feed = "tag", value = "reading" }
timezone = "Europe/London"

[[sources.mqtt]]
name = "site"
host = "broker.thornwick.example"
client_id = "leadline-thornwick"
tls = { ca_file = "tls/ca.pem", cert_file = "tls/client.pem", key_file = "tls/client.key" }
username = "leadline"
password_env = "THORNWICK_MQTT_PASSWORD"
session_expiry_s = 172800
queue_size = 5000

[[sources.mqtt.topics]]
pattern = "thornwick/+zone/flow/+meter"
feed = "{zone}/flow/{meter}"
payload = "json"
value_path = "data.v"
time_path = ["data", "t"]
time_format = "epoch_s"

[[sources.mqtt.topics]]
pattern = "thornwick/senml/#rest"
payload = "senml"
use_sum = true
qos = 0

[feeds.defaults]
seasonality = ["1d:3", "7d"]
weekend = true
holidays = [2026-12-25, "2027-01-01"]
utc_offset = "-5h"
interval = "15min"
train_points = 1500
train_span = "10d"
false_alarms_per_week = 0.5
limits = { cusum_k = 0.75, noise_window = 32 }

[[feeds.override]]
match = "*/flow/*"
range_low = 0
range_high = 300
limits = { ewma_lam = 0.2 }
rules = ["spike", "cusum", "ewma"]

[[feeds.override]]
match = ["north/flow/*", "south/flow/dm-0?"]
threshold_mode = "sigma"
limits = { warning_abs_z = 4.5, alarm_abs_z = 6 }
model = { order = [2, 1, 1], trend = "n" }

[[feeds.override]]
match = "bulk/*"
counter = true
register_size = 1_000_000
interval = "auto"
stale_intervals = 3

[refit]
every = "12h"
on_degraded = false
window_points = 3000
workers = 1

[publish]
broker = "site"
topic_template = "thornwick/alarms/{feed}/{severity}"

[shifts]
timezone = "Europe/London"
early = "06:00-14:00"
late = "14:00-22:00"
night = "22:00-06:00"
"""


@pytest.fixture
def good(tmp_path, monkeypatch):
    monkeypatch.setenv("THORNWICK_MQTT_PASSWORD", "not-a-real-one")
    path = tmp_path / "site" / "leadline.toml"
    path.parent.mkdir()
    path.write_text(GOOD)
    return load_config(path)


def problems_of(text: str, tmp_path: Path) -> str:
    with pytest.raises(ConfigError) as info:
        config_from_text(text, tmp_path / "leadline.toml")
    return str(info.value)


# ------------------------------------------------------------------------------ a good file
def test_good_config_store_and_sources(good, tmp_path):
    site = tmp_path / "site"
    # relative paths are taken from the config file's folder
    assert good.store.url == f"sqlite:///{site / 'data' / 'events.db'}"
    assert good.store.sqlite_path == site / "data" / "events.db"
    assert (good.store.flush_interval_s, good.store.flush_events) == (2.5, 200)

    pumps, levels = good.csv_sources
    assert pumps.path == str(site / "incoming" / "pumps-*.csv")
    layout = pumps.layout()
    assert (layout.layout, layout.delimiter, layout.decimal, layout.time_format) == ("wide", ";", ",", "epoch_ms")
    assert layout.feed_columns == {"P1 bar": "thornwick/pumps/p1/pressure"} and pumps.from_start
    assert levels.path == "/srv/thornwick/levels.csv"
    layout = levels.layout()
    assert (layout.layout, layout.time_column, layout.feed_column, layout.value_column) == ("long", "when", "tag",
                                                                                             "reading")
    assert layout.time_zone == "Europe/London" and not levels.from_start

    (site_broker,) = good.mqtt_sources
    settings = site_broker.settings()
    # TLS given, port not: 8883, the IANA-registered port of MQTT over TLS
    assert (settings.host, settings.port, settings.protocol, settings.tls) == ("broker.thornwick.example", 8883, "5",
                                                                               True)
    assert settings.ca_file == str(site / "tls" / "ca.pem") and settings.key_file == str(site / "tls" / "client.key")
    assert settings.session_expiry_s == 172800 and site_broker.queue_size == 5000
    flow, senml = site_broker.subscriptions()
    assert flow.pattern.filter == "thornwick/+/flow/+"
    assert flow.pattern.feed_id("thornwick/north/flow/dm-01") == "north/flow/dm-01"
    assert flow.parser.value_path == "data.v" and flow.parser.time_path == ("data", "t")
    assert (senml.qos, senml.parser.use_sum, senml.pattern.filter) == (0, True, "thornwick/senml/#")
    assert good.source("site") is site_broker
    assert good.warnings  # the CSV globs and the TLS files do not exist


def test_good_config_refit_publish_shifts(good):
    # 12 h = 43,200 s (SI hour of 3600 s)
    assert good.refit.every_s == 43_200 and not good.refit.on_degraded
    assert (good.refit.window_points, good.refit.workers) == (3000, 1)
    assert good.publish.broker == "site"
    assert good.publish.client_id == "leadline-thornwick-alarms"  # its own session, not the subscriber's
    assert good.publish.topic_template == "thornwick/alarms/{feed}/{severity}"
    assert good.publish.status_topic_template == "leadline/status/{feed}"
    publisher = good.publisher_settings()
    assert publisher.client_id == "leadline-thornwick-alarms" and publisher.host == "broker.thornwick.example"
    assert publisher.password_env == "THORNWICK_MQTT_PASSWORD" and publisher.tls
    shifts = good.shifts
    assert shifts.timezone == "Europe/London"
    assert [(s.name, s.start, s.end, s.overnight) for s in shifts.shifts] == [
        ("early", time(6), time(14), False), ("late", time(14), time(22), False), ("night", time(22), time(6), True)]


def test_feed_settings_defaults_and_overrides(good):
    plain = good.feed_settings("west/level/r2")
    assert plain["overrides"] == []
    # durations: 15 min = 900 s, 10 d = 864,000 s; -5 h = -18,000 s
    assert plain["interval_s"] == 900.0 and plain["train_span_s"] == 864_000.0 and plain["utc_offset_s"] == -18_000.0
    assert plain["seasonality"] == [{"period_s": 86_400.0, "harmonics": 3}, {"period_s": 604_800.0, "harmonics": None}]
    # TOML local date and an ISO date in quotes give the same kind of value
    assert plain["holidays"] == [date(2026, 12, 25), date(2027, 1, 1)]
    assert plain["threshold_mode"] == "budget" and plain["false_alarms_per_week"] == 0.5
    assert plain["limits"] == {"cusum_k": 0.75, "noise_window": 32}
    assert plain["model"] == "auto" and plain["train_points"] == 1500 and plain["weekend"] is True

    east = good.feed_settings("east/flow/dm-07")  # first override only
    assert east["overrides"] == ["feeds.override[1]"]
    assert (east["range_low"], east["range_high"]) == (0.0, 300.0)
    assert east["limits"] == {"cusum_k": 0.75, "noise_window": 32, "ewma_lam": 0.2}  # limits merge key by key
    assert east["rules"] == ["spike", "cusum", "ewma"]

    north = good.feed_settings("north/flow/dm-01")  # both flow overrides, in file order
    assert north["overrides"] == ["feeds.override[1]", "feeds.override[2]"]
    assert north["threshold_mode"] == "sigma"
    assert north["limits"] == {"cusum_k": 0.75, "noise_window": 32, "ewma_lam": 0.2, "warning_abs_z": 4.5,
                               "alarm_abs_z": 6.0}
    assert north["model"] == {"order": [2, 1, 1], "seasonal": None, "trend": "n"}
    assert good.feed_settings("south/flow/dm-03")["threshold_mode"] == "sigma"
    assert good.feed_settings("south/flow/dm-13")["threshold_mode"] == "budget"  # ? matches one character

    bulk = good.feed_settings("bulk/inlet")
    assert bulk["counter"] is True and bulk["register_size"] == 1_000_000.0  # TOML allows 1_000_000
    assert bulk["interval_s"] is None and bulk["stale_intervals"] == 3.0

    # a fresh dict each time: changing one does not change the config
    bulk["limits"]["cusum_k"] = 99.0
    assert good.feed_settings("bulk/inlet")["limits"]["cusum_k"] == 0.75
    assert set(plain) == set(BUILTIN_DEFAULTS) | {"overrides"}


def test_an_empty_file_gives_the_builtin_defaults(tmp_path):
    config = config_from_text("", tmp_path / "x.toml")
    assert config.store.url == f"sqlite:///{tmp_path / 'leadline.db'}"
    assert config.sources == () and config.publish is None and config.shifts is None
    settings = config.feed_settings("any")
    assert settings["train_points"] == 2000 and settings["train_span_s"] == 14 * 86400.0
    assert 1 <= config.refit.workers <= config_mod.available_cores()


def test_limit_keys_follow_the_threshold_functions():
    # the limits table must name exactly the engine's keyword arguments, or the service cannot pass them on
    assert set(LIMIT_CHECKS) == set(inspect.signature(sigma_thresholds).parameters) == set(SIGMA_LIMIT_KEYS)
    assert set(BUDGET_LIMIT_KEYS) <= set(inspect.signature(budget_thresholds).parameters)


def test_the_service_can_build_thresholds_from_the_resolved_limits(good):
    north = good.feed_settings("north/flow/dm-01")
    th = sigma_thresholds(**north["limits"])
    assert th["spike"]["warning_abs_z"] == 4.5 and th["ewma"]["lam"] == 0.2
    east = good.feed_settings("east/flow/dm-07")
    # budget mode: only the keys budget_thresholds takes are left in limits
    assert set(east["limits"]) <= set(inspect.signature(budget_thresholds).parameters)


# ------------------------------------------------------------------------------ mistakes, one kind at a time
@pytest.mark.parametrize(
    "text, fragments",
    [
        # an unknown top-level table, with its closest name
        ("[shift]\nday = '06:00-18:00'\n", ['shift: unknown key; did you mean "shifts"?', "allowed here: store"]),
        # an unknown key inside a table
        ("[feeds.defaults]\ntrian_points = 100\n", ['feeds.defaults.trian_points: unknown key; did you mean '
                                                     '"train_points"?']),
        # case is not a different key
        ("[refit]\nEvery = '1d'\n", ['refit.Every: unknown key; did you mean "every"?']),
        # wrong type: text where an integer belongs
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\nport = '1883'\ntopics = [{pattern = 'a/#'}]\n",
         ['sources.mqtt[1].port = "1883": expected an integer from 1 to 65535']),
        # out of range
        ("[store]\nflush_events = 0\n", ["store.flush_events = 0: expected an integer from 1 to 1000000"]),
        # a choice, with a suggestion
        ("[[sources.csv]]\nname = 'c'\npath = '/x.csv'\nformat = 'longg'\n",
         ['sources.csv[1].format = "longg": expected "long" or "wide"; did you mean "long"?']),
        # a duration the parser does not read
        ("[feeds.defaults]\ninterval = '15 minutes'\n",
         ['feeds.defaults.interval = "15 minutes": expected a duration such as "15min"']),
        # a model the spec refuses: the spec's own reason is kept
        ("[feeds.defaults]\nmodel = { order = [1, 3, 0] }\n",
         ["feeds.defaults.model = { order = [1, 3, 0] }: expected \"auto\", or a table", "d must be <= 2, got 3"]),
        ("[feeds.defaults]\nmodel = 'atuo'\n", ['feeds.defaults.model = "atuo"', 'did you mean "auto"?']),
        # seasonal ARIMA periods above 24 slots are refused (use calendar terms)
        ("[feeds.defaults]\nmodel = { order = [1, 0, 0], seasonal = [0, 1, 1, 96] }\n",
         ["seasonal period s=96 is above 24"]),
        # a time zone that is not in the IANA database, with the closest name
        ("[shifts]\ntimezone = 'Europe/Londn'\nday = '06:00-18:00'\n",
         ['shifts.timezone = "Europe/Londn": expected an IANA time zone name', 'did you mean "Europe/London"?']),
        # shift times
        ("[shifts]\nday = '6-18'\n", ['shifts.day = "6-18": expected a shift as "HH:MM-HH:MM"']),
        ("[shifts]\nday = '06:00-25:00'\n", ['shifts.day = "06:00-25:00": expected a shift']),
        ("[shifts]\ntime_zone = 'Europe/London'\n", ['did you mean the key "timezone"?']),
        ("[shifts]\nlast = '06:00-18:00'\n", ["shifts.last: a shift name must be", "not \"last\" or \"current\""]),
        # a password belongs in an environment variable or a file
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\npassword = 'secret'\ntopics = [{pattern = 'a/#'}]\n",
         ["sources.mqtt[1].password: a password does not belong in the config file"]),
        # the MQTT protocol version as a number
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\nprotocol = 5\ntopics = [{pattern = 'a/#'}]\n",
         ['sources.mqtt[1].protocol = 5: expected "5" or "3.1.1"', 'protocol = "5"']),
        # a required key
        ("[[sources.mqtt]]\nname = 'm'\ntopics = [{pattern = 'a/#'}]\n",
         ["sources.mqtt[1].client_id: required key is missing; expected text"]),
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\n", ["sources.mqtt[1].topics: required"]),
        # a topic pattern the topic module refuses, named at its key path
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\ntopics = [{pattern = 'a/#/b'}]\n",
         ["sources.mqtt[1].topics[1].pattern: topic pattern 'a/#/b'", "'#' is only allowed as the last level"]),
        # an option of another payload kind
        ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\ntopics = [{pattern = 'a/#', value_path = 'v'}]\n",
         ['sources.mqtt[1].topics[1].value_path: applies only to payload = "json"']),
        # one table where an array of tables belongs
        ("[sources.csv]\nname = 'c'\npath = '/x.csv'\n",
         ["sources.csv = { name = \"c\", path = \"/x.csv\" }: expected an array of tables: write [[sources.csv]]"]),
        # names must be unique
        ("[[sources.csv]]\nname = 'c'\npath = '/x.csv'\n[[sources.csv]]\nname = 'c'\npath = '/y.csv'\n",
         ["sources.csv[2].name: 'c' is already the name of sources.csv[1]"]),
        ("[[sources.csv]]\nname = 'c'\npath = '/x.csv'\ndecimal = ','\n",
         ["sources.csv[1].decimal: ',' is also the delimiter"]),
        # the publisher's broker must be an MQTT source
        ("[[sources.mqtt]]\nname = 'site-broker'\nclient_id = 'c'\ntopics = [{pattern = 'a/#'}]\n"
         "[publish]\nbroker = 'site-brokr'\n",
         ['publish.broker = "site-brokr": expected the name of a [[sources.mqtt]] entry: "site-broker"; '
          'did you mean "site-broker"?']),
        ("[[sources.mqtt]]\nname = 'b'\nclient_id = 'c'\ntopics = [{pattern = 'a/#'}]\n"
         "[publish]\nbroker = 'b'\ntopic_template = 'alarms/{rule}'\n",
         ['publish.topic_template = "alarms/{rule}": expected a topic template containing {feed}']),
        ("[[sources.mqtt]]\nname = 'b'\nclient_id = 'c'\ntopics = [{pattern = 'a/#'}]\n"
         "[publish]\nbroker = 'b'\nclient_id = 'c'\n",
         ["publish.client_id: 'c' is the subscriber's client id"]),
        # options that do not go together
        ("[feeds.defaults]\nrange_low = 5\nrange_high = 1\n",
         ["feeds.defaults.range_high: range_high (1) must be above range_low (5"]),
        ("[feeds.defaults]\nregister_size = 1000\n",
         ["feeds.defaults.register_size: applies only to counter feeds"]),
        ("[feeds.defaults]\nthreshold_mode = 'sigma'\nfalse_alarms_per_week = 2\n",
         ['feeds.defaults.false_alarms_per_week: applies only with threshold_mode = "budget"']),
        ("[feeds.defaults]\nlimits = { warning_abs_z = 4 }\n",
         ['feeds.defaults.limits.warning_abs_z: applies only with threshold_mode = "sigma"']),
        ("[feeds.defaults]\nthreshold_mode = 'sigma'\nlimits = { warning_abs_z = 4, alarm_abs_z = 3 }\n",
         ["feeds.defaults.limits.alarm_abs_z: alarm_abs_z (3) must be >= warning_abs_z (4)"]),
        ("[feeds.defaults]\nrules = ['spike', 'ewma']\n", ['feeds.defaults.rules: includes "ewma"']),
        ("[feeds.defaults]\nrules = ['spike', 'cusm']\n",
         ['feeds.defaults.rules = ["spike", "cusm"]: expected a list of rule names; item 2 ("cusm")',
          'did you mean "cusum"?']),
        ("[feeds.defaults]\nlimits = { noise_windw = 3 }\n",
         ['feeds.defaults.limits.noise_windw: unknown key; did you mean "noise_window"?']),
        ("[feeds.defaults]\nholidays = [2026-12-25T00:00:00]\n", ["give the date without a time of day"]),
        ("[feeds.defaults]\nutc_offset = '20h'\n", ["offsets in use lie between -12h and +14h"]),
        ("[[feeds.override]]\nrange_low = 1\n", ["feeds.override[1].match: required key is missing"]),
        ("[[feeds.override]]\nmatch = 'x*'\n", ["feeds.override[1]: sets no option"]),
        ("[[feeds.override]]\nmatch = 'x*'\ncounter = 'yes'\n",
         ['feeds.override[1].counter = "yes": expected true or false (without quotes)']),
        # an override checked against the defaults it lands on
        ("[feeds.defaults]\nrange_high = 10\n[[feeds.override]]\nmatch = 'x*'\nrange_low = 20\n",
         ["feeds.defaults.range_high: range_high (10) must be above range_low (20, feeds.override[1].range_low)"]),
        # the store URL
        ("[store]\nurl = 'mysql://h/db'\n", ['store.url = "mysql://h/db": expected an SQLite file path',
                                             "unsupported store backend 'mysql'"]),
    ],
)
def test_each_mistake_names_key_value_and_what_is_allowed(tmp_path, text, fragments):
    message = problems_of(text, tmp_path)
    assert message.startswith(str(tmp_path / "leadline.toml"))
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in:\n{message}"


def test_refit_workers_at_most_one_per_core(tmp_path, monkeypatch):
    monkeypatch.setattr(config_mod, "available_cores", lambda: 2)
    message = problems_of("[refit]\nworkers = 3\n", tmp_path)
    assert "refit.workers = 3: expected an integer from 1 to 2 (this machine's cores)" in message
    assert config_from_text("[refit]\nworkers = 2\n", tmp_path / "c.toml").refit.workers == 2
    # default: one core left for the live loop
    assert config_from_text("", tmp_path / "c.toml").refit.workers == 1


def test_every_problem_is_listed_at_once(tmp_path):
    text = "[store]\nflush_events = -1\n[refit]\nevery = 'often'\n[feeds.defaults]\nweekend = 1\n"
    message = problems_of(text, tmp_path)
    assert "3 problems:" in message
    assert len([line for line in message.splitlines() if line.startswith("  ")]) == 3


def test_an_error_repeated_by_several_layers_is_reported_once(tmp_path):
    text = ("[feeds.defaults]\nthreshold_mode = 'sigma'\nfalse_alarms_per_week = 2\n"
            "[[feeds.override]]\nmatch = 'a*'\nrange_low = 0\n[[feeds.override]]\nmatch = 'b*'\nrange_low = 1\n")
    message = problems_of(text, tmp_path)
    assert message.count("false_alarms_per_week: applies only") == 1


def test_toml_syntax_error_names_file_and_line(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text('[store]\nurl = "x.db"\nflush_events = = 3\n')
    with pytest.raises(ConfigError, match=re.escape(str(path)) + r": not valid TOML: .*line 3"):
        load_config(path)
    with pytest.raises(ConfigError, match="cannot read the config file"):
        load_config(tmp_path / "missing.toml")


def test_overrides_combining_badly_are_refused_for_that_feed(tmp_path):
    # each override alone is fine; a feed matching both gets sigma mode plus a budget
    text = ("[[feeds.override]]\nmatch = 'north/*'\nthreshold_mode = 'sigma'\n"
            "[[feeds.override]]\nmatch = '*/flow'\nfalse_alarms_per_week = 3\n")
    config = config_from_text(text, tmp_path / "c.toml")
    assert config.feed_settings("south/flow")["false_alarms_per_week"] == 3.0
    with pytest.raises(ConfigError, match=r"feeds\.override\[2\]\.false_alarms_per_week: applies only with "
                                          r"threshold_mode = \"budget\".*for feed 'north/flow'"):
        config.feed_settings("north/flow")


def test_inherited_limits_of_the_other_mode_are_dropped_not_refused(tmp_path):
    # defaults in sigma mode with sigma limits; an override switches some feeds to budget mode
    text = ("[feeds.defaults]\nthreshold_mode = 'sigma'\nlimits = { warning_abs_z = 4.5, alarm_abs_z = 6, "
            "cusum_k = 0.6 }\n[[feeds.override]]\nmatch = 'q/*'\nthreshold_mode = 'budget'\n"
            "false_alarms_per_week = 2\n")
    config = config_from_text(text, tmp_path / "c.toml")
    assert config.feed_settings("q/1")["limits"] == {"cusum_k": 0.6}
    assert config.feed_settings("p/1")["limits"] == {"warning_abs_z": 4.5, "alarm_abs_z": 6.0, "cusum_k": 0.6}


def test_missing_password_variable_is_a_warning_not_an_error(tmp_path, monkeypatch):
    monkeypatch.delenv("NOWHERE_SET_PASSWORD", raising=False)
    text = ("[[sources.mqtt]]\nname = 'm'\nclient_id = 'c'\nusername = 'u'\npassword_env = 'NOWHERE_SET_PASSWORD'\n"
            "topics = [{pattern = 'a/#'}]\n")
    config = config_from_text(text, tmp_path / "c.toml")
    assert any("NOWHERE_SET_PASSWORD" in w and "not set" in w for w in config.warnings)


def test_check_config_command(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("THORNWICK_MQTT_PASSWORD", "x")
    good = tmp_path / "good.toml"
    good.write_text(GOOD)
    assert main(["check-config", str(good), "--feed", "north/flow/dm-01"]) == 0
    out, err = capsys.readouterr()
    assert f"{good}: OK" in out
    assert "source site: MQTT 5 mqtts://broker.thornwick.example:8883" in out
    assert "feed north/flow/dm-01 (overrides: feeds.override[1], feeds.override[2])" in out
    assert 'threshold_mode = "sigma"' in out
    assert "warning: sources.csv[1].path" in err

    bad = tmp_path / "bad.toml"
    bad.write_text("[feeds.defaults]\ntrain_points = 10\n")
    assert main(["check-config", str(bad)]) == 2
    out, err = capsys.readouterr()
    assert "feeds.defaults.train_points = 10: expected an integer >= 50" in err


def test_a_config_that_sets_no_time_zone_is_warned_once_and_one_that_does_is_not(tmp_path):
    # the cycles' clock: without a zone they are fitted on UTC (the README's note on time zones)
    plain = config_from_text('[feeds.defaults]\ninterval = "15min"\n'
                             '[[feeds.override]]\nmatch = "a/*"\nunit = "L/s"\n', tmp_path / "a.toml")
    about_zone = [w for w in plain.warnings if "feeds.defaults.timezone" in w]
    assert len(about_zone) == 1 and "UTC" in about_zone[0] and "summer time" in about_zone[0]
    for text in ('[feeds.defaults]\ntimezone = "Europe/London"\n',
                 '[[feeds.override]]\nmatch = "a/*"\ntimezone = "Europe/Lisbon"\n',
                 '[feeds.defaults]\nutc_offset = "1h"\n'):
        zoned = config_from_text(text, tmp_path / "b.toml")
        assert not [w for w in zoned.warnings if "feeds.defaults.timezone" in w], text
