"""An invented site for the replay tests: the Quillmoor pumping district, four pressure feeds.

Each feed is a seeded AR(1) series (statsmodels' ``arma_generate_sample``
through :func:`leadline.detector.simulate.simulate_arima`) with planted
faults: a 20-sigma wild reading and a level shift. The faults are written to
a labels file in the replay's own format.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

from leadline.detector.simulate import simulate_arima

START = datetime(2026, 4, 6, tzinfo=timezone.utc)
STEP = timedelta(minutes=15)
N = 700  # a week and a bit of 15-minute readings
FEEDS = ("quillmoor/north/pressure", "quillmoor/south/pressure", "quillmoor/weir/pressure",
         "quillmoor/tarn/pressure")
SIGMA = 0.05
SPIKE_AT = {feed: 420 + 30 * i for i, feed in enumerate(FEEDS)}
SHIFT_AT = {feed: 560 + 20 * i for i, feed in enumerate(FEEDS)}

CONFIG = """\
[store]
url = "live.db"

[[sources.csv]]
name = "quillmoor-export"
path = "export/*.csv"
from_start = true

[feeds.defaults]
interval = "15min"
train_points = 300
model = {{ order = [1, 0, 0] }}
threshold_mode = "{mode}"

[refit]
every = "1d"
workers = 1
"""


def series(index: int):
    feed = FEEDS[index]
    values = simulate_arima(N, ar=[0.6], mean=4.0 + index, sigma=SIGMA, seed=100 + index)
    values[SPIKE_AT[feed]] += 20 * SIGMA / (1 - 0.36) ** -0.5  # 20 innovation sigmas above the forecast
    values[SHIFT_AT[feed]:] += 8 * SIGMA
    return values


def stamp(i: int) -> str:
    return (START + i * STEP).isoformat()


def write_site(folder: Path, mode: str = "sigma", files: int = 2) -> Path:
    """The config, ``files`` CSV files (1 or 2; long layout) and a labels file; the config's path."""
    (folder / "export").mkdir(parents=True, exist_ok=True)
    data = [series(i) for i in range(len(FEEDS))]
    parts = (("a", FEEDS[:2]), ("b", FEEDS[2:])) if files == 2 else (("a", FEEDS),)
    for part, feeds in parts:
        with (folder / "export" / f"quillmoor-{part}.csv").open("w") as handle:
            handle.write("timestamp,feed,value\n")
            for i in range(N):
                for feed in feeds:
                    handle.write(f"{stamp(i)},{feed},{float(data[FEEDS.index(feed)][i])!r}\n")
    with (folder / "labels.csv").open("w") as handle:
        handle.write("feed,start,end,kind,note\n")
        for feed in FEEDS:
            handle.write(f"{feed},{stamp(SPIKE_AT[feed])},{stamp(SPIKE_AT[feed])},spike,planted wild reading\n")
            handle.write(f"{feed},{stamp(SHIFT_AT[feed])},{stamp(SHIFT_AT[feed] + 8)},level shift,planted step\n")
    path = folder / "leadline.toml"
    path.write_text(CONFIG.format(mode=mode))
    return path


def comparable(events) -> dict:
    """Final events by key -> (end, severity, peak |z| (None for NaN), model version, detail): NaN-safe equality."""
    out = {}
    for event in events:
        peak = None if event.peak_abs_z != event.peak_abs_z else event.peak_abs_z
        out[event.key] = (event.end, event.severity, peak, event.model_version, event.detail)
    return out
