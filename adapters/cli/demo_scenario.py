"""The demo's invented scenario: the water district of the fictional town of Fenwick Vale.

Eight feeds at 15-minute intervals: three district-meter flows with daily
and weekly cycles, a reservoir level, a booster pump's discharge pressure,
a chlorine residual sensor, a spiky district meter and a cumulative bulk
meter register. 14 days of history are followed by 2 "live" days in which
faults are planted:

========================  =========================================  ================
feed                      planted fault                              rule expected
========================  =========================================  ================
fenwick/dm-north/flow     night leak: +1.4 L/s from 02:00 on day 1   cusum (a shift)
fenwick/dm-east/flow      one wild reading (+9 L/s)                  spike
fenwick/booster/pressure  transmitter drift, 0.15 sigma per step     cusum (a drift)
fenwick/reservoir/level   sensor stuck at one value for 10 hours     flatline
fenwick/chlorine/residual loose connection: noise x4 for 8 hours     noise_burst
fenwick/bulk-west/volume  6-digit register rolls over 999999 -> 0    none (handled)
fenwick/dm-south/flow     none                                       none
fenwick/dm-mill/flow      none                                       none
========================  =========================================  ================

Every number comes from seeded generators, so the demo is the same on
every machine.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import numpy as np

from leadline.detector.simulate import simulate_arima

START = datetime(2026, 10, 5, tzinfo=timezone.utc)  # a Monday
INTERVAL = timedelta(minutes=15)
SLOTS_PER_DAY = 96
HISTORY_DAYS = 14
LIVE_DAYS = 2
REGISTER_SIZE = 1_000_000.0


@dataclass(frozen=True)
class PlantedFault:
    feed_id: str
    kind: str
    rule: str | None
    start_slot: int
    end_slot: int
    description: str


@dataclass
class Scenario:
    feeds: dict[str, np.ndarray]
    faults: list[PlantedFault]

    @property
    def n_slots(self) -> int:
        return next(iter(self.feeds.values())).size

    def slot_time(self, slot: int) -> datetime:
        return START + slot * INTERVAL


def _diurnal(n: int, base: float, morning: float, evening: float, weekend_drop: float) -> np.ndarray:
    """A district demand curve: morning and evening peaks, a night minimum, a quieter weekend.

    Built from three daily harmonics, so the calendar terms of the demo's
    config can follow it; the weekend lowers the level by ``weekend_drop``
    of the morning peak.
    """
    phase = 2 * np.pi * (np.arange(n) % SLOTS_PER_DAY) / SLOTS_PER_DAY
    day = np.arange(n) // SLOTS_PER_DAY
    curve = (-0.5 * (morning + evening) * np.cos(phase)
             + 0.35 * morning * np.sin(2 * phase - 0.6)
             + 0.15 * evening * np.cos(3 * phase + 0.4))
    weekend = (day % 7) >= 5
    return base + 0.5 * (morning + evening) + curve - np.where(weekend, weekend_drop * morning, 0.0)


def build_scenario(seed: int = 1871) -> Scenario:
    """All eight feeds, history and live days, with the faults planted."""
    n = (HISTORY_DAYS + LIVE_DAYS) * SLOTS_PER_DAY
    live = HISTORY_DAYS * SLOTS_PER_DAY
    feeds: dict[str, np.ndarray] = {}
    faults: list[PlantedFault] = []

    def noise(ar, sigma, offset):
        return simulate_arima(n, ar=ar, sigma=sigma, seed=seed + offset)

    north = _diurnal(n, 6.0, 9.0, 7.0, 0.2) + noise([0.6], 0.35, 1)
    leak_at = live + 2 * 4  # 02:00 on the first live day
    north[leak_at:] += 1.4
    feeds["fenwick/dm-north/flow"] = north
    faults.append(PlantedFault("fenwick/dm-north/flow", "night leak", "cusum", leak_at, n,
                               "a leak adds 1.4 L/s from 02:00: the minimum night flow steps up"))

    feeds["fenwick/dm-south/flow"] = _diurnal(n, 4.0, 6.0, 5.0, 0.25) + noise([0.5], 0.3, 2)
    feeds["fenwick/dm-mill/flow"] = _diurnal(n, 9.0, 4.0, 3.0, 0.5) + noise([0.7], 0.4, 3)

    east = _diurnal(n, 5.0, 7.0, 6.0, 0.2) + noise([0.5], 0.3, 4)
    spike_at = live + 96 + 46  # 11:30 on the second live day
    east[spike_at] += 9.0
    feeds["fenwick/dm-east/flow"] = east
    faults.append(PlantedFault("fenwick/dm-east/flow", "wild reading", "spike", spike_at, spike_at + 1,
                               "one reading 9 L/s too high (a telemetry glitch)"))

    pressure = 4.6 + noise([0.7], 0.02, 5)
    sd = 0.02 / np.sqrt(1 - 0.7 ** 2)
    drift_at = live + 20
    pressure[drift_at:] -= 0.15 * 0.02 * np.arange(n - drift_at)
    feeds["fenwick/booster/pressure"] = np.round(pressure, 4)
    faults.append(PlantedFault("fenwick/booster/pressure", "transmitter drift", "cusum", drift_at, n,
                               f"the transmitter drifts down 0.003 bar per reading (sd {sd:.3f} bar)"))

    level = 3.2 + 0.25 * np.sin(2 * np.pi * (np.arange(n) % SLOTS_PER_DAY) / SLOTS_PER_DAY) + noise([0.8], 0.01, 6)
    level = np.round(level, 3)
    stuck_at = live + 96 + 8
    level[stuck_at : stuck_at + 40] = level[stuck_at]
    feeds["fenwick/reservoir/level"] = level
    faults.append(PlantedFault("fenwick/reservoir/level", "stuck sensor", "flatline", stuck_at, stuck_at + 40,
                               "the level sensor repeats one value for 10 hours"))

    chlorine = 0.62 + noise([0.6], 0.008, 7)
    burst_at = live + 60
    rng = np.random.default_rng(seed + 8)
    chlorine[burst_at : burst_at + 32] += rng.normal(0.0, 4 * 0.008, 32)
    feeds["fenwick/chlorine/residual"] = np.round(chlorine, 4)
    faults.append(PlantedFault("fenwick/chlorine/residual", "noise burst", "noise_burst", burst_at, burst_at + 32,
                               "a loose connection adds noise four times the usual for 8 hours"))

    usage = np.clip(_diurnal(n, 20.0, 30.0, 25.0, 0.2) + noise([0.5], 2.0, 9), 0.0, None)
    register = (REGISTER_SIZE - 1500.0 - np.cumsum(usage)[live] + np.cumsum(usage)) % REGISTER_SIZE
    feeds["fenwick/bulk-west/volume"] = np.round(register, 1)
    roll_at = int(np.flatnonzero(np.diff(feeds["fenwick/bulk-west/volume"]) < 0)[0]) + 1
    faults.append(PlantedFault("fenwick/bulk-west/volume", "register rollover", None, roll_at, roll_at + 1,
                               "the 6-digit register rolls over from 999999 to 0; the delta stays right"))
    return Scenario(feeds, faults)


def rows_for_slot(scenario: Scenario, slot: int) -> list[str]:
    """CSV lines ``timestamp,feed,value`` of one slot, one per feed."""
    stamp = scenario.slot_time(slot).isoformat().replace("+00:00", "Z")
    return [f"{stamp},{feed_id},{float(values[slot])!r}" for feed_id, values in scenario.feeds.items()]


def rows_for_day(scenario: Scenario, day: int) -> list[str]:
    """CSV lines of one day, in time order."""
    return [line for slot in range(day * SLOTS_PER_DAY, (day + 1) * SLOTS_PER_DAY)
            for line in rows_for_slot(scenario, slot)]
