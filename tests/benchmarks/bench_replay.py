"""Replay speed and memory: the fast path (quiet runs) against the per-reading engine, in one run.

Run: ``python tests/benchmarks/bench_replay.py [--feeds 1000] [--days 30] [--sample 50] [--quick]``

Writes N invented feeds x D days of one-minute readings (seeded AR(1), the
Heronsgate district, one long-layout CSV file in time order) and a config
with a fixed AR(1) model, the default learning window of 2,000 readings, a
daily refit and the default budget limits (0.2 false alarms per feed-week;
``--mode sigma`` for the fixed sigma limits, which raise far more episodes
on the same feeds and so send more readings through the per-reading path). Then, in one run, times:

* ``per-reading`` and ``fast``: :func:`~leadline.adapters.replay.runner.replay_group`
  on the same ``--sample`` feeds with ``fast=False`` (every reading through
  ``Engine.process``, the ticks of the merged history) and ``fast=True``
  (feed by feed, quiet runs taken at once), each fit timed on its own, so
  that the engine's share (the whole less the fits, which cost the same on
  both paths) is printed beside the whole;
* ``replay w=1`` and ``replay w=2``: :func:`leadline.adapters.replay.session.run_replay`
  over all N feeds (the fast path), 1 and 2 processes, after the history is read;
* the history read (CSV parsing) on its own.

Memory: the tracemalloc peak of the one-process replay (history read, run
and results, not the store write) and the growth of the resident set size,
less the bytes of the history arrays, per 1,000 feeds (the slope between
half the feeds and all of them).
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
from leadline.adapters.replay.runner import replay_group  # noqa: E402
from leadline.adapters.replay.session import history_for, replay_settings, run_replay  # noqa: E402
from leadline.adapters.replay.writer import write_results  # noqa: E402
from leadline.detector.engine import run_refit_with_thresholds  # noqa: E402
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
model = {{ order = [1, 0, 0] }}
threshold_mode = "{mode}"

[refit]
every = "1d"
workers = 1
"""


def write_history(folder: Path, feeds: int, days: int, mode: str = "budget") -> int:
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
    (folder / "leadline.toml").write_text(CONFIG.format(mode=mode))
    return feeds * n


def rss_bytes() -> int:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * resource.getpagesize()


class TimedRefit:
    """The default refit, its time added up (fits cost the same on both paths)."""

    def __init__(self) -> None:
        self.seconds = 0.0
        self.fits = 0

    def __call__(self, request):
        began = time.perf_counter()
        try:
            return run_refit_with_thresholds(request)
        finally:
            self.seconds += time.perf_counter() - began
            self.fits += 1


def time_paths(history, settings, sample: int) -> list[tuple[str, float, float, int, int]]:
    """(path, seconds, fit seconds, readings, events) of the per-reading and the fast path on the sample."""
    feeds = [history.feeds[f] for f in sorted(history.feeds)[:sample]]
    rows = []
    for name, fast in (("per-reading engine", False), ("fast path (quiet runs)", True)):
        refit = TimedRefit()
        began = time.perf_counter()
        result = replay_group(feeds, settings, refit=refit, fast=fast)
        seconds = time.perf_counter() - began
        rows.append((name, seconds, refit.seconds, result.readings, len(result.events), result.quiet_readings))
    return rows


def time_replay(config_path: Path, history, workers: int, url: str) -> tuple[float, int]:
    config = load_config(config_path)
    began = time.perf_counter()
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


def memory_slope(folder: Path, feeds: int, days: int, mode: str) -> None:
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
        write_history(sub, n, days, mode)
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
    parser.add_argument("--sample", type=int, default=50,
                        help="feeds timed on both paths side by side (the per-reading one is slow)")
    parser.add_argument("--mode", choices=("budget", "sigma"), default="budget")
    parser.add_argument("--quick", action="store_true", help="20 feeds x 3 days")
    args = parser.parse_args(argv)
    if args.quick:
        args.feeds, args.days, args.sample = 20, 3, 20
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        readings = write_history(folder, args.feeds, args.days, args.mode)
        config_path = folder / "leadline.toml"
        print(f"{args.feeds} feeds x {args.days} days of 1-minute readings = {readings} readings "
              f"({(folder / 'history.csv').stat().st_size / 1e6:.0f} MB of CSV), {args.mode} limits; "
              f"cores: {os.cpu_count()}")
        config = load_config(config_path)
        began = time.perf_counter()
        history = history_for(config)
        read_s = time.perf_counter() - began
        print(f"  history read (CSV parsing)        {read_s:8.1f} s  {readings / read_s:10.0f} readings/s")
        settings = replay_settings(config, list(history.feeds))
        rows = time_paths(history, settings, args.sample)
        base_all = rows[0][3] / rows[0][1]
        base_engine = rows[0][3] / (rows[0][1] - rows[0][2])
        print(f"  side by side on {min(args.sample, args.feeds)} feeds:")
        for name, seconds, fit_s, n, events, quiet in rows:
            engine_s = seconds - fit_s
            print(f"    {name:26s} {seconds:7.1f} s ({fit_s:6.1f} s fits)  {n / seconds:9.0f} readings/s "
                  f"x{n / seconds / base_all:5.2f};  engine alone {engine_s / n * 1e6:6.2f} us/reading "
                  f"x{n / engine_s / base_engine:6.2f}  ({events} events, {quiet / n:.0%} in quiet runs)")
        for workers in (1, 2):
            seconds, events = time_replay(config_path, history, workers, f"sqlite:///{folder / f'replay{workers}.db'}")
            print(f"  all {args.feeds} feeds, replay workers={workers}: {seconds:8.1f} s  {readings / seconds:10.0f} "
                  f"readings/s  ({events} events, store write included)")
        memory_slope(folder, args.feeds, args.days, args.mode)
    return 0


if __name__ == "__main__":
    sys.exit(main())
