"""Replay speed and memory: the fast path (quiet runs) against the per-reading engine, in one run.

Run: ``python tests/benchmarks/bench_replay.py [--feeds 1000] [--days 30] [--sample 50] [--whole] [--quick]``

Builds N invented feeds x D days of one-minute readings (seeded AR(1), each
feed its own seed, the Heronsgate district; with ``--whole`` also written
as one long-layout CSV file in time order) and a config
with a fixed AR(1) model, the default learning window of 2,000 readings, a
daily refit and the default budget limits (0.2 false alarms per feed-week;
``--mode sigma`` for the fixed sigma limits, which raise far more episodes
on the same feeds and so send more readings through the per-reading path).
Then, in one run:

* the fits of the ``--sample`` feeds, made once (the fast path's first run)
  and timed: they cost the same on both paths and are then taken from a
  cache, so that the timed runs measure the engine alone;
* ``per-reading`` and ``fast``: :func:`~leadline.adapters.replay.runner.replay_group`
  on those feeds with ``fast=False`` (every reading through
  ``Engine.process``, the ticks of the merged history) and ``fast=True``
  (feed by feed, quiet runs taken at once), side by side; the ratios are
  printed for the engine alone and with the fits added back;
* the time of all N feeds at the sample's rates (feeds are independent:
  the cost of a feed does not depend on the others);
* with ``--whole`` (and ``--quick``): the history read (CSV parsing), and
  ``leadline replay``'s own path over all N feeds with real fits, 1 and 2
  processes.

Memory: the tracemalloc peak and the growth of the resident set size of the
fast replay (run and results, not the store write) beyond the history
arrays, per 1,000 feeds: the slope between half the sample and all of it,
each in a fresh process, fits from the cache, scaled to 1,000 feeds.
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
from leadline.adapters.replay.history import FeedHistory  # noqa: E402
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


def feed_values(index: int, days: int) -> np.ndarray:
    """Feed ``index``'s one-minute readings (seeded per feed, so that any subset is the same)."""
    rng = np.random.default_rng([20260202, index])
    n = days * 1440
    phi, sigma = 0.7, 0.1
    shocks = rng.normal(0.0, sigma, n)
    x = np.empty(n)
    x[0] = shocks[0]
    for t in range(1, n):
        x[t] = phi * x[t - 1] + shocks[t]
    return np.round(x + 3.0 + index * 0.01, 5)  # as written to the CSV


def feed_name(index: int) -> str:
    return f"heronsgate/{index:04d}/level"


def histories(feeds: int, days: int) -> dict[str, FeedHistory]:
    """The first ``feeds`` feeds as the replay holds them (what reading the CSV gives)."""
    epochs = START.timestamp() + 60.0 * np.arange(days * 1440)
    return {feed_name(i): FeedHistory(feed_name(i), epochs.copy(), feed_values(i, days)) for i in range(feeds)}


def write_site(folder: Path, feeds: int, days: int, mode: str = "budget", csv: bool = True) -> int:
    """The config and (with ``csv``) the history of all feeds as one long-layout CSV in time order."""
    (folder / "leadline.toml").write_text(CONFIG.format(mode=mode))
    n = days * 1440
    if csv:
        x = np.stack([feed_values(i, days) for i in range(feeds)])
        names = [feed_name(i) for i in range(feeds)]
        with (folder / "history.csv").open("w") as handle:
            handle.write("timestamp,feed,value\n")
            for t in range(n):
                stamp = (START + timedelta(minutes=t)).isoformat()
                handle.write("".join(f"{stamp},{names[i]},{x[i, t]:.5f}\n" for i in range(feeds)))
    return feeds * n


def rss_bytes() -> int:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * resource.getpagesize()


class CachedRefit:
    """The default refit, timed, each result kept by (feed, request number) for the timed runs.

    Both paths ask for the same fits in the same order (the replay is
    deterministic), so the timed runs take them from here and measure the
    engine alone; the fits' own cost is measured once, on the first run.
    """

    def __init__(self) -> None:
        self.seconds = 0.0
        self.fits: dict[tuple[str, int], tuple] = {}
        self.misses = 0

    def __call__(self, request):
        key = (request.feed_id, request.request_id)
        kept = self.fits.get(key)
        if kept is not None and np.array_equal(kept[0], request.values, equal_nan=True):
            return kept[1]
        self.misses += 1
        began = time.perf_counter()
        result = run_refit_with_thresholds(request)
        self.seconds += time.perf_counter() - began
        self.fits[key] = (request.values.copy(), result)
        return result


def time_paths(feeds: list[FeedHistory], settings) -> tuple[float, int, list[tuple], dict]:
    """Fit seconds, fits, (path, seconds, events, quiet readings, readings) of both paths on
    ``feeds``, and the fits kept."""
    refit = CachedRefit()
    replay_group(feeds, settings, refit=refit, fast=True)  # the fits, timed once
    fit_s, fitted = refit.seconds, refit.misses
    rows = []
    for name, fast in (("per-reading engine", False), ("fast path (quiet runs)", True)):
        began = time.perf_counter()
        result = replay_group(feeds, settings, refit=refit, fast=fast)
        rows.append((name, time.perf_counter() - began, len(result.events), result.quiet_readings, result.readings))
    if refit.misses != fitted:
        raise RuntimeError(f"the paths asked for different fits ({refit.misses - fitted} not in the cache)")
    return fit_s, fitted, rows, refit.fits


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


def memory(config_path: Path, cache_path: Path, feeds: int, days: int) -> tuple[int, int, int]:
    """(history bytes of the feeds, tracemalloc peak, RSS growth) of the fast replay of the first
    ``feeds`` feeds, fits from the cache (loaded, with the histories, before the measure starts)."""
    import pickle

    config = load_config(config_path)
    chosen = list(histories(feeds, days).values())
    settings = replay_settings(config, [h.feed_id for h in chosen])
    refit = CachedRefit()
    refit.fits = pickle.loads(cache_path.read_bytes())
    input_bytes = sum(h.epoch_s.nbytes + h.values.nbytes for h in chosen)
    before = rss_bytes()
    tracemalloc.start()
    result = replay_group(chosen, settings, refit=refit, fast=True)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    grown = rss_bytes() - before
    if refit.misses:
        raise RuntimeError(f"{refit.misses} fits were not in the cache")
    del result
    return input_bytes, peak, grown


def memory_slope(folder: Path, cache_path: Path, sample: int, days: int) -> None:
    """Memory per 1,000 feeds beyond the input: the slope between half the sample and all of it.

    Each size runs in a fresh process (the peak and RSS of one run are not
    the next's), its fits taken from the cache of the timed runs, so a fit's
    transient arrays are not counted; what is counted is what the replay
    keeps per feed (events, models, evidence) and its working state.
    """
    import subprocess

    sizes = sorted({max(1, sample // 2), sample})
    measured = {}
    for n in sizes:
        code = ("import sys; sys.path.insert(0, %r); import bench_replay as b, pathlib; "
                "print(*b.memory(pathlib.Path(%r), pathlib.Path(%r), %d, %d))"
                % (str(Path(__file__).parent), str(folder / "leadline.toml"), str(cache_path), n, days))
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
        measured[n] = [int(x) for x in out.split()[-3:]]
    for n in sizes:
        input_bytes, peak, grown = measured[n]
        print(f"  memory, {n} feeds: their history arrays {input_bytes / 1e6:.1f} MB; replay: tracemalloc peak "
              f"{peak / 1e6:.1f} MB, RSS growth {grown / 1e6:.1f} MB")
    if len(sizes) == 2:
        a, b = sizes
        per = 1000.0 / (b - a)
        (_, pa, ga), (_, pb, gb) = measured[a], measured[b]
        print(f"  memory per 1,000 feeds beyond the input (slope {a} -> {b} feeds): tracemalloc peak "
              f"{(pb - pa) * per / 1e6:.0f} MB, RSS {(gb - ga) * per / 1e6:.0f} MB")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--feeds", type=int, default=1000)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--sample", type=int, default=50,
                        help="feeds timed on both paths side by side (the per-reading one is slow)")
    parser.add_argument("--mode", choices=("budget", "sigma"), default="budget")
    parser.add_argument("--whole", action="store_true",
                        help="also replay all feeds with real fits, 1 and 2 processes (fits dominate: slow)")
    parser.add_argument("--quick", action="store_true", help="20 feeds x 3 days")
    args = parser.parse_args(argv)
    if args.quick:
        args.feeds, args.days, args.sample, args.whole = 20, 3, 20, True
    sample = min(args.sample, args.feeds)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        readings = write_site(folder, args.feeds, args.days, args.mode, csv=args.whole)
        config_path = folder / "leadline.toml"
        config = load_config(config_path)
        print(f"{args.feeds} feeds x {args.days} days of 1-minute readings = {readings} readings, "
              f"{args.mode} limits, daily refits; cores: {os.cpu_count()}")
        feeds = list(histories(sample, args.days).values())
        settings = replay_settings(config, [h.feed_id for h in feeds])
        fit_s, fits, rows, refit_cache = time_paths(feeds, settings)
        n = rows[0][4]
        print(f"  side by side on {sample} of the feeds ({n} readings; {fits} fits, {fit_s:.1f} s, "
              f"{fit_s / fits * 1e3:.0f} ms a fit, made once and then taken from a cache):")
        base_engine, base_all = rows[0][1], rows[0][1] + fit_s
        for name, seconds, events, quiet, _ in rows:
            print(f"    {name:24s} engine {seconds:7.1f} s  {seconds / n * 1e6:6.2f} us/reading  "
                  f"x{base_engine / seconds:6.2f};  with the fits {n / (seconds + fit_s):8.0f} readings/s "
                  f"x{base_all / (seconds + fit_s):5.2f}  ({events} events, {quiet / n:.0%} in quiet runs)")
        per_reading_s, fast_s = rows[0][1] / n, rows[1][1] / n
        print(f"  all {args.feeds} feeds at these rates: engine {readings * per_reading_s / 3600:.2f} h "
              f"per-reading, {readings * fast_s / 60:.1f} min fast; fits {fit_s / sample * args.feeds / 3600:.2f} h "
              f"on one core on either path")
        if args.whole:
            began = time.perf_counter()
            history = history_for(config)
            read_s = time.perf_counter() - began
            print(f"  history read (CSV parsing, {(folder / 'history.csv').stat().st_size / 1e6:.0f} MB) "
                  f"{read_s:8.1f} s  {readings / read_s:10.0f} readings/s")
            for workers in (1, 2):
                seconds, events = time_replay(config_path, history, workers,
                                              f"sqlite:///{folder / f'replay{workers}.db'}")
                print(f"  all {args.feeds} feeds, leadline replay's path, workers={workers}: {seconds:8.1f} s  "
                      f"{readings / seconds:10.0f} readings/s  ({events} alarms, store write included)")
        import pickle

        cache_path = folder / "fits.pickle"
        cache_path.write_bytes(pickle.dumps(refit_cache))
        memory_slope(folder, cache_path, sample, args.days)
    return 0


if __name__ == "__main__":
    sys.exit(main())
