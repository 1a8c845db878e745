"""The soak's input: four invented AR(1) feeds at 1-minute steps with planted faults.

Two feeds arrive as rows of a followed CSV file, two over MQTT (QoS 1, JSON
with their own times). Each feed has wild readings planted at fixed steps
(spikes of 12 standard deviations of the process) and one feed a level
shift of 6 process standard deviations, so the rules have episodes to open
and close, the CUSUM re-anchors and the diagnostics may ask for refits.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import numpy as np

from leadline.detector.simulate import simulate_arima

START = datetime(2026, 4, 6, tzinfo=timezone.utc)
STEP = timedelta(minutes=1)
CSV_FEEDS = ("saltmere/intake/flow", "saltmere/outfall/flow")
MQTT_FEEDS = ("brackenby/north/pressure", "brackenby/south/pressure")
MQTT_TOPIC = "brackenby/{site}/pressure"

CONFIG = """\
[store]
url = "leadline.db"
flush_interval_s = 1.0
snapshot_interval_s = {snapshot_interval_s}

[[sources.csv]]
name = "saltmere-export"
path = "export/*.csv"
from_start = true

[[sources.mqtt]]
name = "brackenby-broker"
host = "127.0.0.1"
port = {port}
client_id = "leadline-soak"
protocol = "5"
topics = [{{ pattern = "brackenby/+site/pressure", feed = "brackenby/{{site}}/pressure", payload = "json", value_path = "v", time_path = "t" }}]

[feeds.defaults]
interval = "1min"
train_points = 200
model = {{ order = [1, 0, 0] }}
threshold_mode = "sigma"
stale_intervals = 1000000

[refit]
every = "{refit_every}"
workers = 1
install_delay_slots = 10
"""


@dataclass(frozen=True)
class Scenario:
    """``values[feed]``: one value per step, step ``i`` at ``START + i * STEP``."""

    steps: int
    values: dict[str, np.ndarray]

    @property
    def feeds(self) -> tuple[str, ...]:
        return CSV_FEEDS + MQTT_FEEDS


def make_scenario(steps: int, seed: int = 2026) -> Scenario:
    """Seeded AR(1) feeds (phi 0.6) with spikes every ~700 steps and one level shift at 60 %."""
    values: dict[str, np.ndarray] = {}
    for k, feed in enumerate(CSV_FEEDS + MQTT_FEEDS):
        v = simulate_arima(steps, ar=[0.6], mean=20.0 + 5 * k, sigma=0.5, seed=seed + k)
        sd = 0.5 / np.sqrt(1 - 0.6 ** 2)
        for at in range(350 + 97 * k, steps, 700):
            v[at] += (12 if (at // 700) % 2 == 0 else -12) * sd
        if k == 1:
            v[int(steps * 0.6):] += 6 * sd
        values[feed] = v
    return Scenario(steps, values)


def stamp(i: int) -> str:
    return (START + i * STEP).isoformat().replace("+00:00", "Z")


def csv_rows(scenario: Scenario, rows: range) -> str:
    return "".join(f"{stamp(i)},{feed},{float(scenario.values[feed][i])!r}\n" for i in rows for feed in CSV_FEEDS)


def mqtt_messages(scenario: Scenario, rows: range) -> list[tuple[str, str]]:
    out = []
    for i in rows:
        for feed in MQTT_FEEDS:
            site = feed.split("/")[1]
            out.append((MQTT_TOPIC.format(site=site), json.dumps({"t": stamp(i), "v": float(scenario.values[feed][i])})))
    return out
