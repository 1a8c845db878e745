"""Invented feed families and planted faults for bench_detection.py.

Every family is y_t = base(t) + x_t with phi(B) (1 - B)^d x_t = theta(B) e_t,
e_t ~ N(0, sigma^2), plus an optional deterministic cycle on local time and a
display resolution. Faults are sized in units of the shock sigma.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np

LONDON = ZoneInfo("Europe/London")


@dataclass(frozen=True)
class Family:
    """One invented feed family.

    ``cycle`` adds a daily and a weekly cycle on Europe/London local time
    (so the cycle moves by an hour in UTC at a DST change).
    """

    name: str
    ar: tuple[float, ...] = ()
    ma: tuple[float, ...] = ()
    d: int = 0
    mean: float = 100.0
    sigma: float = 1.0
    resolution: float = 0.01
    interval_s: float = 60.0
    start: datetime = datetime(2025, 1, 6, tzinfo=timezone.utc)
    cycle: bool = False
    note: str = ""
    #: range of the onset (readings into a trial); the clean stretch before it counts for false alarms
    onsets: tuple[int, int] = (150, 351)
    #: a family whose daily scheduled refits are dear (15-minute slots: one refit per 96 readings)
    costly: bool = False
    #: the IANA zone of the feed's clock, set as a site sets ``timezone`` once for its feeds
    timezone: str | None = None

    @property
    def label(self) -> str:
        p, q = len(self.ar), len(self.ma)
        if self.d:
            return f"ARIMA({p},{self.d},{q})"
        return {(0, 0): "white", (1, 0): "AR(1)", (0, 1): "MA(1)"}.get((p, q), f"ARMA({p},{q})")


def _ar1_shock_sd(phi: float, marginal_sd: float) -> float:
    return marginal_sd * math.sqrt(1.0 - phi * phi)


FAMILIES = [
    Family("white", note="white noise around 100"),
    Family("ar1", ar=(0.7,), note="AR(1), phi 0.7"),
    Family("ma1", ma=(0.5,), note="MA(1), theta 0.5"),
    Family("arma11", ar=(0.6,), ma=(0.3,), note="ARMA(1,1), phi 0.6, theta 0.3"),
    Family("arima111", ar=(0.6,), ma=(-0.3,), d=1, note="ARIMA(1,1,1), phi 0.6, theta -0.3"),
    Family("arima011", ma=(-0.5,), d=1, note="ARIMA(0,1,1), theta -0.5"),
    # 15-minute flow, daily + weekly cycle on London time; the trials start
    # 2025-03-30 00:00 UTC, one hour before the clocks go forward (01:00 UTC).
    # Default settings refit every day (96 slots), so onsets come early (after
    # the DST change, before the first scheduled refit) to keep refits per trial down
    Family("flow15", ar=(0.5,), mean=50.0, interval_s=900.0, cycle=True,
           start=datetime(2025, 3, 16, tzinfo=timezone.utc), onsets=(20, 81), costly=True, timezone="Europe/London",
           note="15-min flow, daily + weekly cycle on Europe/London time, AR(1) 0.5 noise, DST change in the trials"),
    # a flow parked at a set point, whole units: 2/3 of readings repeat
    Family("quantized", mean=40.0, sigma=0.4, resolution=1.0,
           note="set point 40, sd 0.4, rounded to whole units (about 2/3 repeats)"),
    Family("vibration", ar=(0.4,), mean=0.0268, sigma=_ar1_shock_sd(0.4, 0.0003), resolution=1e-6,
           note="mean 0.0268, sd 0.0003, AR(1) 0.4, 1e-6 resolution"),
]


def cycle_value(epoch_s: np.ndarray) -> np.ndarray:
    """Daily and weekly cycle of a flow on Europe/London wall-clock time (amplitudes 8 and 3 units)."""
    out = np.empty(epoch_s.size)
    for i, e in enumerate(epoch_s):
        local = datetime.fromtimestamp(float(e), tz=LONDON)
        hour = local.hour + local.minute / 60.0
        dow = local.weekday() + hour / 24.0
        daily = 6.0 * math.sin(2 * math.pi * (hour - 9.0) / 24.0) + 2.0 * math.cos(4 * math.pi * (hour - 7.0) / 24.0)
        weekly = -3.0 * math.cos(2 * math.pi * dow / 7.0) - (2.0 if local.weekday() >= 5 else 0.0)
        out[i] = daily + weekly
    return out


@dataclass
class History:
    """What a continuation needs: the last p ARMA values, the last q shocks, the integrated level, the slot."""

    w: np.ndarray
    e: np.ndarray
    level: float
    slot: int


@dataclass
class Piece:
    """A simulated stretch: unrounded noise part, shocks (in units of sigma), first slot."""

    x: np.ndarray
    shocks: np.ndarray
    slot: int
    history: History = field(repr=False, default=None)


class Simulator:
    """Continues one family from a saved history, so every trial follows the training window."""

    def __init__(self, fam: Family) -> None:
        self.fam = fam
        self.p, self.q = len(fam.ar), len(fam.ma)
        self._cycle_cache: dict[int, float] = {}

    def start(self) -> History:
        return History(np.zeros(self.p), np.zeros(self.q), 0.0, 0)

    def run(self, n: int, rng: np.random.Generator, history: History) -> Piece:
        p, q = self.p, self.q
        ar, ma = np.array(self.fam.ar), np.array(self.fam.ma)
        w = np.concatenate([history.w, np.zeros(n)])
        shocks = rng.standard_normal(n)
        e = np.concatenate([history.e, shocks])
        for t in range(n):
            i, j = p + t, q + t
            value = e[j]
            if p:
                value += ar @ w[i - p:i][::-1]
            if q:
                value += ma @ e[j - q:j][::-1]
            w[i] = value
        x = w[p:]
        level = history.level
        if self.fam.d:
            x = level + np.cumsum(x)
            level = float(x[-1])
        new = History(w[len(w) - p:].copy() if p else np.zeros(0), e[len(e) - q:].copy() if q else np.zeros(0),
                      level, history.slot + n)
        return Piece(self.fam.sigma * x, shocks, history.slot, new)

    def epochs(self, slot: int, n: int) -> np.ndarray:
        return self.fam.start.timestamp() + self.fam.interval_s * np.arange(slot, slot + n, dtype=float)

    def base(self, slot: int, n: int) -> np.ndarray:
        """The deterministic part: the mean plus the local-time cycle."""
        if not self.fam.cycle:
            return np.full(n, self.fam.mean)
        out = np.empty(n)
        for i in range(n):
            s = slot + i
            if s not in self._cycle_cache:
                self._cycle_cache[s] = float(cycle_value(self.epochs(s, 1))[0])
            out[i] = self._cycle_cache[s]
        return self.fam.mean + out

    def readings(self, piece: Piece, extra: np.ndarray | None = None) -> np.ndarray:
        """Displayed readings: base + noise (+ a fault's additive part), rounded to the resolution."""
        y = self.base(piece.slot, piece.x.size) + piece.x
        if extra is not None:
            y = y + extra
        return self.round(y)

    def round(self, y: np.ndarray) -> np.ndarray:
        r = self.fam.resolution
        return np.round(y / r) * r


# ------------------------------------------------------------------ faults
#: kind: (window in readings for recall, span of the fault in readings; None = to the end of the trial)
FAULTS = {
    "spike": (8, 1),
    "level_shift": (8, None),
    "drift": (48, None),
    "flatline": (24, None),
    "noise_burst": (24, 48),
}
SPIKE_SIGMA = 7.0
SHIFT_SIGMA = 4.0
DRIFT_SIGMA_PER_STEP = 0.15
BURST_FACTOR = 3.0
AFTER_ONSET = 120  # readings simulated after the onset in a recall trial


def inject(kind: str, sim: Simulator, piece: Piece, onset: int,
           rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """The displayed readings of a trial with one fault planted at ``onset`` (index into the piece), and its sign."""
    sigma = sim.fam.sigma
    n = piece.x.size
    sign = 1.0 if rng.random() < 0.5 else -1.0
    extra = np.zeros(n)
    if kind == "spike":
        extra[onset] = sign * SPIKE_SIGMA * sigma
    elif kind == "level_shift":
        extra[onset:] = sign * SHIFT_SIGMA * sigma
    elif kind == "drift":
        extra[onset:] = sign * DRIFT_SIGMA_PER_STEP * sigma * np.arange(1, n - onset + 1)
    elif kind == "noise_burst":
        m = min(48, n - onset)
        extra[onset:onset + m] = rng.normal(0.0, math.sqrt(BURST_FACTOR ** 2 - 1.0) * sigma, m)
    y = sim.readings(piece, extra)
    if kind == "flatline":
        y[onset:] = y[onset - 1]
    return y, sign


def timestamps(sim: Simulator, slot: int, n: int) -> list[datetime]:
    start = sim.fam.start
    step = timedelta(seconds=sim.fam.interval_s)
    return [start + step * (slot + i) for i in range(n)]
