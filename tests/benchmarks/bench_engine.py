"""The engine at scale: per-reading cost, memory and checkpoints for 1,000 to 100,000 watched feeds.

Run: ``python tests/benchmarks/bench_engine.py`` (``--quick`` for 1,000 and
10,000 feeds only; ``--feeds 1000 10000 100000`` to choose).

One AR(1) feed (phi 0.6, a 300-reading training window, the default
2,000-slot refit window and the default rules and false-alarm budget) is
learned, fitted and run until its refit window is full. Its checkpoint is
then restored under N feed ids, so every feed watches with a full window
and the same model, as after a restart. For each N it prints, measured in
one run:

- **engine us/reading**: readings of all N feeds, one slot at a time
  across the feeds (as they arrive live), through ``Engine.process``, and
  the share of them taken by the quiet step (:mod:`leadline.detector.quiet_step`);
- **per-reading us** and **gain**: the same readings through an engine with
  ``quiet_steps=False`` (every reading the whole per-reading path), timed
  slot by slot alternately with the first, so both see the same machine
  (up to 10,000 feeds; ``--reference-up-to``);
- **stream us/reading** and the **ratio**: the same values through
  ``Stream.update`` alone, N streams restored from the same state: what the
  rules and the bookkeeping add to the model step;
- **KiB/feed (tracemalloc)**: Python allocations held per feed after the
  readings, and **KiB/feed (RSS)**, the growth of the resident set;
- **checkpoint B/feed** and the **round s**: the mean checkpoint size, and
  the time of one ``Engine.checkpoints()`` of all N feeds.

It also prints the memory of a feed still learning, holding 1,999
readings before its first fit (a site's first start, when every feed learns).

Absolute times vary on a shared machine; compare the ratios and the
per-feed figures. The targets (issue of the scale round): at most 16 KiB per
watched feed and 4 KiB per checkpoint, 5 us per reading amortised at 10,000
feeds.
"""

from __future__ import annotations

import argparse
import gc
import resource
import sys
import time
import tracemalloc
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from leadline.detector.engine import Engine, run_refit  # noqa: E402
from leadline.detector.feed_settings import FeedSettings  # noqa: E402
from leadline.detector.feed_state import pack, unpack  # noqa: E402
from leadline.detector.readings import Reading  # noqa: E402
from leadline.detector.spec import ModelSpec  # noqa: E402
from leadline.detector.stream import Stream  # noqa: E402

T0 = datetime(2026, 3, 2, tzinfo=timezone.utc)
INTERVAL_S = 60.0
PHI = 0.6
# no scheduled refits and no diagnostics refits: a refit the benchmark asked for would never be
# installed (it times the engine alone), and the feed would stay on the slow path waiting for it
SETTINGS = FeedSettings(spec=ModelSpec.ar(1), train_points=300, min_train_points=100, refit_every_s=None,
                        diagnostics_refit=False)


def ar1(n: int, rng: np.random.Generator, mean: float = 40.0) -> np.ndarray:
    e = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = e[0]
    for t in range(1, n):
        x[t] = PHI * x[t - 1] + e[t]
    return mean + x


def rss_kib() -> float:
    """The resident set now, in KiB (Linux /proc), or the peak where /proc is missing."""
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * resource.getpagesize() / 1024.0
    except OSError:
        return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def template_checkpoint() -> tuple[bytes, int, int]:
    """A watched AR(1) feed with a full refit window: (checkpoint, model version, next slot)."""
    engine = Engine(lambda feed_id: SETTINGS)
    y = ar1(SETTINGS.train_points + SETTINGS.refit_window_points + 10, np.random.default_rng(2026))
    for k, value in enumerate(y):
        out = engine.process(Reading("template", T0 + timedelta(seconds=k * INTERVAL_S), float(value)))
        for request in out.refit_requests:
            engine.install_model("template", run_refit(request), 1, request.reason, request=request)
    assert engine.state_of("template") == "watching"
    return engine.checkpoint("template"), 1, y.size


def as_feed(header: dict, arrays: dict, feed_id: str) -> bytes:
    return pack({**header, "feed_id": feed_id}, arrays)


def _engine(header: dict, arrays: dict, version: int, ids: list[str], quiet: bool) -> Engine:
    engine = Engine(lambda feed_id: SETTINGS, quiet_steps=quiet)
    for fid in ids:
        engine.restore(fid, as_feed(header, arrays, fid), version)
    return engine


def measure(n_feeds: int, template: bytes, version: int, first_slot: int, steps: int,
            with_tracemalloc: bool, with_reference: bool) -> dict[str, float]:
    header, arrays = unpack(template)
    ids = [f"site-{i:06d}" for i in range(n_feeds)]
    rng = np.random.default_rng(n_feeds)
    # 64 distinct AR(1) paths, repeated across the feeds (the cost does not depend on which)
    values = 40.0 + np.vstack([ar1(steps, rng, mean=0.0) for _ in range(min(n_feeds, 64))]).T
    values = np.tile(values, (1, -(-n_feeds // values.shape[1])))[:, :n_feeds]
    times = [T0 + timedelta(seconds=(first_slot + k) * INTERVAL_S) for k in range(steps)]

    gc.collect()
    if with_tracemalloc:
        tracemalloc.start()
    traced0 = tracemalloc.get_traced_memory()[0] if with_tracemalloc else 0
    rss0 = rss_kib()
    engine = _engine(header, arrays, version, ids, True)
    # one slot for every feed first (restores deliver their state changes), then the timed slots
    for j, fid in enumerate(ids):
        engine.process(Reading(fid, times[0], float(values[0, j])))
    gc.collect()
    traced = (tracemalloc.get_traced_memory()[0] - traced0) if with_tracemalloc else float("nan")
    rss = rss_kib() - rss0
    if with_tracemalloc:
        tracemalloc.stop()
    reference = _engine(header, arrays, version, ids, False) if with_reference else None
    if reference is not None:
        for j, fid in enumerate(ids):
            reference.process(Reading(fid, times[0], float(values[0, j])))

    engine_s = reference_s = 0.0
    quiet0 = engine.quiet_readings
    for k in range(1, steps):
        when = times[k]
        row = values[k].tolist()
        for timed in (engine, reference):
            if timed is None:
                continue
            start = time.perf_counter()
            for j, fid in enumerate(ids):
                timed.process(Reading(fid, when, row[j]))
            if timed is engine:
                engine_s += time.perf_counter() - start
            else:
                reference_s += time.perf_counter() - start
    quiet_share = (engine.quiet_readings - quiet0) / ((steps - 1) * n_feeds)
    del reference

    start = time.perf_counter()
    states = engine.checkpoints()
    round_s = time.perf_counter() - start
    checkpoint_bytes = float(np.mean([len(b) for b, _ in states.values()]))
    del states

    stream_bytes = arrays["stream"].tobytes()
    streams = [Stream.from_bytes(stream_bytes) for _ in ids]
    start = time.perf_counter()
    for k in range(1, steps):
        row = values[k].tolist()
        for j, stream in enumerate(streams):
            stream.update(row[j])
    stream_s = time.perf_counter() - start
    readings = (steps - 1) * n_feeds
    return {"feeds": n_feeds, "engine_us": engine_s / readings * 1e6, "stream_us": stream_s / readings * 1e6,
            "reference_us": reference_s / readings * 1e6 if with_reference else float("nan"),
            "quiet_share": quiet_share,
            "traced_kib": traced / 1024.0 / n_feeds, "rss_kib": rss / n_feeds,
            "checkpoint_b": checkpoint_bytes, "round_s": round_s}


def learning_kib_per_feed(n_feeds: int, readings: int) -> float:
    """Python allocations held per feed still learning, after ``readings`` readings each (tracemalloc)."""
    settings = FeedSettings(spec=ModelSpec.ar(1), train_points=readings + 1, min_train_points=100)
    rng = np.random.default_rng(7)
    values = (40.0 + rng.standard_normal(readings)).tolist()
    times = [T0 + timedelta(seconds=k * INTERVAL_S) for k in range(readings)]
    gc.collect()
    tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0]
    engine = Engine(lambda feed_id: settings)
    ids = [f"learning-{i:05d}" for i in range(n_feeds)]
    for k in range(readings):
        for fid in ids:
            engine.process(Reading(fid, times[k], values[k]))
    gc.collect()
    held = tracemalloc.get_traced_memory()[0] - before
    tracemalloc.stop()
    assert all(engine.state_of(fid) == "learning" for fid in ids)
    return held / 1024.0 / n_feeds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--feeds", type=int, nargs="+", default=None)
    parser.add_argument("--quick", action="store_true", help="1,000 and 10,000 feeds")
    parser.add_argument("--steps", type=int, default=None, help="slots per feed (default: about 10^6 readings)")
    parser.add_argument("--reference-up-to", type=int, default=10_000,
                        help="time the per-reading path (quiet_steps=False) beside it up to this many feeds")
    parser.add_argument("--no-tracemalloc-above", type=int, default=10**9,
                        help="skip tracemalloc (slow) above this many feeds; RSS is always measured")
    args = parser.parse_args(argv)
    sizes = args.feeds or ([1, 1000, 10_000] if args.quick else [1, 1000, 10_000, 100_000])
    t = time.perf_counter()
    template, version, next_slot = template_checkpoint()
    print(f"template feed learned, fitted and filled in {time.perf_counter() - t:.1f} s; "
          f"checkpoint {len(template)} bytes")
    print(f"{'feeds':>8} {'engine us/rdg':>13} {'quiet':>6} {'per-rdg us':>10} {'gain':>5} {'stream us/rdg':>13} "
          f"{'ratio':>7} {'KiB/feed tm':>11} {'KiB/feed RSS':>12} {'ckpt B/feed':>11} {'round s':>8}")
    for n in sizes:
        steps = args.steps or max(3, min(2000, 1_000_000 // n))
        r = measure(n, template, version, next_slot, steps, with_tracemalloc=n <= args.no_tracemalloc_above,
                    with_reference=n <= args.reference_up_to)
        print(f"{r['feeds']:>8} {r['engine_us']:>13.2f} {r['quiet_share']:>6.0%} {r['reference_us']:>10.2f} "
              f"{r['reference_us'] / r['engine_us']:>5.2f} {r['stream_us']:>13.2f} "
              f"{r['engine_us'] / r['stream_us']:>7.1f} {r['traced_kib']:>11.1f} {r['rss_kib']:>12.1f} "
              f"{r['checkpoint_b']:>11.0f} {r['round_s']:>8.2f}", flush=True)
    n_learning = 100 if args.quick else 500
    print(f"learning: {learning_kib_per_feed(n_learning, 1999):.1f} KiB per feed holding 1,999 readings before "
          f"its first fit ({n_learning} feeds, tracemalloc)")
    print("targets: <= 16 KiB/feed in memory, <= 4 KiB/checkpoint, <= 5 us/reading at 10,000 feeds")
    return 0


if __name__ == "__main__":
    sys.exit(main())
