"""Replay speed and memory: ``leadline replay`` (1 and 2 workers) against the engine driven reading by reading.

Run: ``python tests/benchmarks/bench_replay.py [--feeds 1000] [--days 30] [--quick]``

Writes N invented feeds x D days of one-minute readings (seeded AR(1), the
Heronsgate district, one long-layout CSV file in time order) and a config
with a fixed AR(1) model, sigma limits, the default learning window of 2,000
readings and a daily refit. Then, in one run, times:

* ``engine``: the per-reading engine as ``leadline run --replay`` drives it
  (the service loop: the CSV follower, ``Engine.process`` per reading,
  ticks, refits inline, staging in a SQLite store) until the file is read;
* ``replay w=1`` and ``replay w=2``: :func:`leadline.adapters.replay` (read
  the history, run the feed groups, write the store), 1 and 2 processes;

and prints readings/s and the ratio to ``engine``. Memory: the tracemalloc
peak of the one-process replay (history read, run and results, not the
store write) and the growth of the resident set size, less the bytes of the
history arrays, per 1,000 feeds. Fits cost the same on every path; the
engine's per-reading cost is the rest.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
import tracemalloc
from datetime import datetime, timedelta, timezone
from pathlib import Path

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

from leadline.adapters.config.file import load_config  # noqa: E402
from leadline.adapters.replay.session import history_for, replay_settings, run_replay  # noqa: E402
from leadline.adapters.replay.writer import write_results  # noqa: E402
from leadline.adapters.service.wiring import build_service  # noqa: E402
from leadline.adapters.store import open_store  # noqa: E402

START = datetime(2026, 2, 2, tzinfo=timezone.utc)
CONFIG = """\
[store]
url = "live.db"

[[sources.csv]]
name = "heronsgate"
path = "history.csv"
from_start = true

[feeds.defaults]
interval = "1min"
model = { order = [1, 0, 0] }
threshold_mode = "sigma"

[refit]
every = "1d"
workers = 1
"""


def write_history(folder: Path, feeds: int, days: int) -> int:
    rng = np.random.default_rng(20260202)
    n = days * 1440
    phi, sigma = 0.7, 0.1
    x = np.zeros((feeds, n))
    shocks = rng.normal(0.0, sigma, (feeds, n))
    for t in range(1, n):
        x[:, t] = phi * x[:, t - 1] + shocks[:, t]
    x += 3.0 + np.arange(feeds)[:, None] * 0.01
    names = [f"heronsgate/{i:04d}/level" for i in range(feeds)]
    with (folder / "history.csv").open("w") as handle:
        handle.write("timestamp,feed,value\n")
        for t in range(n):
            stamp = (START + timedelta(minutes=t)).isoformat()
            handle.write("".join(f"{stamp},{names[i]},{x[i, t]:.5f}\n" for i in range(feeds)))
    (folder / "leadline.toml").write_text(CONFIG)
    return feeds * n


def rss_bytes() -> int:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * resource.getpagesize()


def time_engine(config_path: Path) -> float:
    config = load_config(config_path)
    service = build_service(config, from_start=True, replay=True, refit_workers=0)
    began = time.perf_counter()
    try:
        service.run(until_idle=lambda: True)
    finally:
        service.store.close()
    return time.perf_counter() - began


def time_replay(config_path: Path, workers: int, url: str) -> tuple[float, int]:
    config = load_config(config_path)
    began = time.perf_counter()
    history = history_for(config)
    run = run_replay(history, replay_settings(config, list(history.feeds)), workers=workers)
    store = open_store(url)
    try:
        write_results(store, run.results)
    finally:
        store.close()
    return time.perf_counter() - began, run.summary.events


def memory(config_path: Path) -> tuple[int, int, int]:
    """(history array bytes, tracemalloc peak, RSS growth) of a one-process replay, store write left out."""
    config = load_config(config_path)
    before = rss_bytes()
    tracemalloc.start()
    history = history_for(config)
    input_bytes = sum(h.epoch_s.nbytes + h.values.nbytes for h in history.feeds.values())
    run_replay(history, replay_settings(config, list(history.feeds)))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return input_bytes, peak, rss_bytes() - before


def memory_slope(folder: Path, feeds: int, days: int) -> None:
    """Memory per 1,000 feeds beyond the input: the slope between half the feeds and all of them.

    A fit's transient arrays are a fixed cost whatever the number of feeds, so
    the slope, not the total over the feeds, is the cost per feed. Each size
    runs in a fresh process (the peak and RSS of one run are not the next's).
    """
    import subprocess

    sizes = sorted({max(1, feeds // 2), feeds})
    measured = {}
    for n in sizes:
        sub = folder / f"mem{n}"
        sub.mkdir()
        write_history(sub, n, days)
        code = ("import sys; sys.path.insert(0, %r); import bench_replay as b, pathlib; "
                "print(*b.memory(pathlib.Path(%r)))" % (str(Path(__file__).parent), str(sub / "leadline.toml")))
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
        measured[n] = [int(x) for x in out.split()[-3:]]
    for n in sizes:
        input_bytes, peak, grown = measured[n]
        print(f"memory, {n} feeds: history arrays {input_bytes / 1e6:.1f} MB, tracemalloc peak "
              f"{peak / 1e6:.1f} MB, RSS growth {grown / 1e6:.1f} MB")
    if len(sizes) == 2:
        a, b = sizes
        per = 1000.0 / (b - a)
        (ia, pa, ga), (ib, pb, gb) = measured[a], measured[b]
        print(f"memory per 1,000 feeds beyond the input (slope {a} -> {b} feeds): tracemalloc peak "
              f"{((pb - ib) - (pa - ia)) * per / 1e6:.0f} MB, RSS {((gb - ib) - (ga - ia)) * per / 1e6:.0f} MB")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--feeds", type=int, default=1000)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--quick", action="store_true", help="20 feeds x 3 days")
    args = parser.parse_args(argv)
    if args.quick:
        args.feeds, args.days = 20, 3
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        readings = write_history(folder, args.feeds, args.days)
        config_path = folder / "leadline.toml"
        print(f"{args.feeds} feeds x {args.days} days of 1-minute readings = {readings} readings "
              f"({(folder / 'history.csv').stat().st_size / 1e6:.0f} MB of CSV); cores: {os.cpu_count()}")
        engine_s = time_engine(config_path)
        rows = [("engine (run --replay loop, per reading)", engine_s, None)]
        for workers in (1, 2):
            seconds, events = time_replay(config_path, workers, f"sqlite:///{folder / f'replay{workers}.db'}")
            rows.append((f"replay workers={workers}", seconds, events))
        for name, seconds, events in rows:
            print(f"  {name:42s} {seconds:8.1f} s  {readings / seconds:10.0f} readings/s  "
                  f"x{engine_s / seconds:5.2f} vs engine" + (f"  ({events} events)" if events is not None else ""))
        memory_slope(folder, args.feeds, args.days)
    return 0


if __name__ == "__main__":
    sys.exit(main())
