"""deploy/: the systemd unit, the example config and the Mosquitto config, checked against the tools that read them.

* The unit is read with configparser (systemd unit files are ini-style, systemd.syntax(7)) and,
  where it exists, by ``systemd-analyze verify`` itself.
* Its command line is parsed by the CLI's own argparse parser.
* The example config goes through ``leadline check-config``, and the feed ids its sources produce
  are resolved against its overrides.
* Mosquitto itself (mosquitto.conf(5), version 2.0) loads ``mosquitto-site.conf`` with only the
  file paths and the port moved to a temporary folder, and leadline's subscriber, built from the
  example config, connects to it over TLS with a password.
"""

from __future__ import annotations

import configparser
import dataclasses
import json
import os
import re
import shlex
import shutil
import subprocess
import time
import tomllib
from pathlib import Path

import pytest

from leadline.adapters.cli import build_parser, main
from leadline.adapters.config import load_config

REPO = Path(__file__).resolve().parents[1]
DEPLOY = REPO / "deploy"
UNIT = DEPLOY / "leadline.service"
EXAMPLE = DEPLOY / "leadline.example.toml"
MOSQUITTO_CONF = DEPLOY / "mosquitto-site.conf"


def read_unit(path: Path = UNIT) -> configparser.ConfigParser:
    parser = configparser.ConfigParser(interpolation=None, strict=True, empty_lines_in_values=False)
    parser.optionxform = str  # systemd keys are case-sensitive
    parser.read_string(path.read_text())
    return parser


def exec_start() -> list[str]:
    return shlex.split(read_unit()["Service"]["ExecStart"])


# ------------------------------------------------------------------------------ the unit
def test_unit_runs_as_a_dedicated_user_restarts_and_is_sandboxed():
    unit = read_unit()
    service = unit["Service"]
    assert (service["User"], service["Group"]) == ("leadline", "leadline")
    assert service["Restart"] == "on-failure"
    for key, value in {"ProtectSystem": "strict", "ProtectHome": "true", "NoNewPrivileges": "true",
                       "PrivateTmp": "true", "PrivateDevices": "true"}.items():
        assert service.get(key) == value, key
    assert service["KillSignal"] == "SIGTERM"  # the service drains and flushes on SIGTERM
    assert unit["Install"]["WantedBy"] == "multi-user.target"
    assert "network-online.target" in unit["Unit"]["After"]


def test_exec_start_is_a_command_of_the_cli():
    argv = exec_start()
    # the program is the console script pyproject.toml installs into the venv at /opt/leadline
    scripts = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["scripts"]
    assert Path(argv[0]).parent == Path("/opt/leadline/bin")
    assert scripts[Path(argv[0]).name] == "leadline.adapters.cli:main"
    parser = build_parser()
    subcommands = next(a for a in parser._actions if a.dest == "command").choices
    assert argv[1] in subcommands, (
        f"the unit runs `leadline {argv[1]}`, but adapters/cli/ registers no {argv[1]!r} subcommand "
        f"(registered: {sorted(subcommands)})")
    options = {s for a in subcommands[argv[1]]._actions for s in a.option_strings}
    assert "--config" in options
    args = parser.parse_args(argv[1:])
    assert (args.command, args.config) == ("run", "/etc/leadline/leadline.toml")


def test_paths_are_under_etc_and_var_lib():
    service = read_unit()["Service"]
    config_path = Path(exec_start()[exec_start().index("--config") + 1])
    assert config_path.parent == Path("/etc/leadline")
    state = Path("/var/lib") / service["StateDirectory"]
    assert service["ReadWritePaths"].split() == [str(state)] == ["/var/lib/leadline"]
    assert service["WorkingDirectory"] == str(state)

    # the example config (installed at config_path) writes only where the unit lets it
    example = load_config(EXAMPLE)
    assert example.store.sqlite_path.parent == state
    for source in example.mqtt_sources:
        for path in (source.ca_file, source.password_file):
            assert Path(path).is_relative_to("/etc/leadline"), path
    for source in example.csv_sources:
        assert not Path(source.path).is_relative_to("/home"), "ProtectHome=true hides /home from the service"


#: The units the unit depends on, directly or by systemd's default dependencies.
_TARGETS = ("sysinit.target", "basic.target", "multi-user.target", "network-online.target", "shutdown.target",
            "sockets.target", "paths.target", "timers.target", "slices.target", "local-fs.target", "swap.target")


def _verify(unit_text: str, root: Path) -> subprocess.CompletedProcess[str]:
    """``systemd-analyze verify`` of the unit installed in a scratch root with a stand-in program."""
    system_units = next((d for d in (Path("/usr/lib/systemd/system"), Path("/lib/systemd/system")) if d.is_dir()),
                        None)
    if system_units is None:
        pytest.skip("systemd-analyze exists but no systemd unit directory does; cannot build a root to verify in")
    (root / "etc/systemd/system").mkdir(parents=True, exist_ok=True)
    (root / "usr/lib/systemd/system").mkdir(parents=True, exist_ok=True)
    for name in _TARGETS:
        if (system_units / name).exists():
            shutil.copyfile(system_units / name, root / "usr/lib/systemd/system" / name)
    program = root / exec_start()[0].lstrip("/")
    program.parent.mkdir(parents=True, exist_ok=True)
    program.write_text("#!/bin/sh\nexit 0\n")
    program.chmod(0o755)
    (root / "etc/systemd/system/leadline.service").write_text(unit_text)
    return subprocess.run(["systemd-analyze", "verify", f"--root={root}", "leadline.service"],
                          capture_output=True, text=True, timeout=60)


def test_systemd_analyze_verify(tmp_path):
    if shutil.which("systemd-analyze") is None:
        pytest.skip("systemd-analyze is not installed here; the unit was only parsed as ini")
    result = _verify(UNIT.read_text(), tmp_path / "root")
    complaints = [line for line in (result.stdout + result.stderr).splitlines() if "leadline" in line]
    assert result.returncode == 0 and not complaints, result.stdout + result.stderr
    # the same check catches a bad value (systemd warns and ignores it, exit status 0)
    broken = UNIT.read_text().replace("ProtectSystem=strict", "ProtectSystem=stricter")
    result = _verify(broken, tmp_path / "broken")
    assert "stricter" in result.stdout + result.stderr


# ------------------------------------------------------------------------------ the example config
def test_example_config_passes_check_config(capsys):
    assert main(["check-config", str(EXAMPLE)]) == 0
    out, err = capsys.readouterr()
    assert f"{EXAMPLE}: OK" in out
    assert "error" not in err.lower()


def test_example_overrides_match_the_feeds_its_sources_produce():
    example = load_config(EXAMPLE)
    (broker,) = example.mqtt_sources
    flow, reservoir = broker.subscriptions()
    dma = flow.pattern.feed_id("marrowby/dma/hilltop/flow/dm-03")
    # a SenML pack on the reservoir topic names its records; the subscriber appends the name
    level = f"{reservoir.pattern.feed_id('marrowby/reservoir/north')}/level"
    (scada,) = example.csv_sources
    pressure, chlorine, bulk = scada.feed_columns.values()
    expected = {dma: "feeds.override[1]", level: "feeds.override[2]", pressure: "feeds.override[3]",
                chlorine: "feeds.override[4]", bulk: "feeds.override[5]"}
    for feed_id, override in expected.items():
        assert example.feed_settings(feed_id)["overrides"] == [override], feed_id
    assert example.feed_settings(bulk)["counter"] is True
    assert example.feed_settings(pressure)["threshold_mode"] == "sigma"
    assert example.publish.broker == broker.name and example.shifts.timezone == "Europe/London"


# ------------------------------------------------------------------------------ the Mosquitto config
def mosquitto_options(text: str) -> list[tuple[str, str]]:
    out = []
    for line in text.splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            key, _, value = line.strip().partition(" ")
            out.append((key, value.strip()))
    return out


def _seconds(text: str) -> float:
    units = {"h": 3600, "d": 86400, "w": 7 * 86400}
    return float(text[:-1]) * units[text[-1]]


def test_mosquitto_config_has_auth_tls_persistence_and_a_sized_queue():
    text = MOSQUITTO_CONF.read_text()
    options = dict(mosquitto_options(text))
    assert options["allow_anonymous"] == "false" and options["password_file"]
    assert options["listener"] == "8883"
    assert options["cafile"] and options["certfile"] and options["keyfile"]
    assert options["persistence"] == "true"
    queued = int(options["max_queued_messages"])
    # mosquitto.conf(5) of Mosquitto 2.x, max_queued_messages: the default is 1000 per client and messages
    # beyond the bound are dropped; 0 would remove the bound, which the manual advises against
    assert queued > 1000
    # the reasoning in the comment and the value agree: outage x rate x headroom <= the bound
    feeds = int(re.search(r"feeds leadline subscribes to\s+([\d,]+)", text).group(1).replace(",", ""))
    interval_s = int(re.search(r"every\s+\d+ min\s+\((\d+) s\)", text).group(1))
    outage_h = int(re.search(r"outage to ride through\s+(\d+) h", text).group(1))
    headroom = float(re.search(r"x ([\d.]+) headroom", text).group(1))
    assert feeds / interval_s * outage_h * 3600 * headroom <= queued
    # leadline's session outlives the planned outage, and the broker keeps it at least as long
    session_s = load_config(EXAMPLE).mqtt_sources[0].session_expiry_s
    assert outage_h * 3600 < session_s <= _seconds(options["persistent_client_expiration"])


@pytest.mark.broker
def test_mosquitto_loads_the_site_config_and_leadline_connects_with_tls_and_password(tmp_path):
    from mqtt_broker import MosquittoBroker, make_password_file, make_tls_files, mosquitto_binary

    from leadline.adapters.sources.mqtt_subscriber import MqttSubscriber

    if mosquitto_binary() is None or shutil.which("mosquitto_passwd") is None or shutil.which("openssl") is None:
        pytest.skip("mosquitto, mosquitto_passwd and openssl are needed to start the site broker")
    tls = make_tls_files(tmp_path / "tls")
    password = "marrowby-test-password"
    passwd = make_password_file(tmp_path / "passwd", "leadline", password)
    broker = MosquittoBroker(tmp_path / "broker")
    moved = {
        "listener": f"{broker.port} 127.0.0.1",  # loopback only, on a free port
        "cafile": str(tls.ca_file), "certfile": str(tls.server_cert), "keyfile": str(tls.server_key),
        "password_file": str(passwd), "persistence_location": f"{broker.store_dir}/",
        "pid_file": str(tmp_path / "mosquitto.pid"), "log_dest": f"file {broker.log_path}",
    }
    lines = []
    for line in MOSQUITTO_CONF.read_text().splitlines():
        key = line.split(" ", 1)[0]
        lines.append(f"{key} {moved[key]}" if key in moved and not line.startswith("#") else line)
    if os.geteuid() == 0:
        lines.append("user root")  # otherwise Mosquitto drops to its own user and cannot write the store
    broker.config_path.write_text("\n".join(lines) + "\n")
    site = load_config(EXAMPLE).mqtt_sources[0]
    (tmp_path / "client-password").write_text(password + "\n")
    (tmp_path / "wrong-password").write_text("not-it\n")
    with broker:
        source = dataclasses.replace(site, host="127.0.0.1", port=broker.port, ca_file=str(tls.ca_file),
                                     password_file=str(tmp_path / "client-password"))
        subscriber = MqttSubscriber(source.name, source.settings(), source.subscriptions())
        subscriber.start()
        try:
            subscriber.wait_connected(15)
            import paho.mqtt.client as mqtt
            from paho.mqtt.enums import CallbackAPIVersion

            publisher = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="marrowby-outstation-7",
                                    protocol=mqtt.MQTTv5)
            publisher.tls_set(ca_certs=str(tls.ca_file))
            publisher.username_pw_set("leadline", password)
            publisher.connect("127.0.0.1", broker.port)
            publisher.loop_start()
            info = publisher.publish("marrowby/dma/hilltop/flow/dm-03",
                                     json.dumps({"v": 41.7, "t": "2026-03-14T06:15:00Z"}), qos=1)
            info.wait_for_publish(10)
            got = []
            deadline = time.monotonic() + 10
            while not got and time.monotonic() < deadline:
                got = subscriber.poll(10, 0.1)
            subscriber.ack(got)
            publisher.loop_stop()
            publisher.disconnect()
            assert [(r.feed_id, r.value) for r in got] == [("marrowby/hilltop/flow/dm-03", 41.7)]
        finally:
            subscriber.close()

        wrong = dataclasses.replace(source, client_id="leadline-wrong", password_file=str(tmp_path / "wrong-password"))
        refused = MqttSubscriber(wrong.name, wrong.settings(), wrong.subscriptions())
        refused.start()
        try:
            deadline = time.monotonic() + 10
            while not (refused.last_error or "").startswith("connection refused") and time.monotonic() < deadline:
                time.sleep(0.02)
            assert re.search("(?i)not authori[sz]ed|bad user ?name or password", refused.last_error or ""), \
                refused.last_error
            assert not refused.connected
        finally:
            refused.close()
        assert broker.running, broker.log_text()


def test_unit_is_notify_type_and_does_not_restart_on_a_bad_config():
    from leadline.adapters.cli.exit_codes import EX_CONFIG, EX_TEMPFAIL

    service = read_unit()["Service"]
    assert service["Type"] == "notify" and service["NotifyAccess"] == "main"
    assert int(service["WatchdogSec"]) > 0
    # sysexits.h: EX_CONFIG stops the restart loop; EX_TEMPFAIL is restarted by Restart=on-failure
    assert service["RestartPreventExitStatus"].split() == [str(EX_CONFIG)]
    assert str(EX_TEMPFAIL) not in service["RestartPreventExitStatus"].split()
    assert service["UMask"] == "0077"
