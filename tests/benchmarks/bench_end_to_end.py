"""End to end: ``leadline run`` on MQTT into SQLite and PostgreSQL, beside a bare paho client.

Run (from the repository root; needs the mosquitto binary, and PostgreSQL at
127.0.0.1:5432 with trust auth for ``--store postgresql``)::

    python -m tests.benchmarks.bench_end_to_end [--feeds 1000 10000] [--store sqlite|postgresql|both] [--quick]

(also ``python tests/benchmarks/bench_end_to_end.py ...``). For each number of
feeds and each store, on a fresh private Mosquitto (``tests/mqtt_broker.py``,
a free loopback port) and a fresh store (an SQLite file in a temporary
folder, or a throw-away PostgreSQL database dropped afterwards):

1. *Publishers alone*: P = 3 paho publisher processes (at nice 5,
   ``e2e_clients``) publish QoS 1 JSON
   readings (``{"t": epoch_s, "v": value}`` on ``e2e/gNNN/mNN``) flat out to
   the broker with only the bare client subscribed: the publishers' own rate.
2. *Learning*: the real ``leadline run`` starts (a subprocess with a config
   file, subscribed at QoS 1 with a persistent MQTT 5 session) and every feed
   gets ``train_points + 2`` readings, flat out; the benchmark polls the
   store's ``feed_status`` until every feed is ``watching``.
3. *Latency*: a paced background load (a tenth of the learning phase's
   rate, so the service keeps up and no queue builds) while the publishers
   plant one spike of +20 standard deviations in each of ``--spikes`` feeds,
   0.5-1 s apart (seeded random gaps, so the spikes meet the service's 1 s
   flush timer at every phase), published out of the feed's turn. Latency is from
   the publisher's ``publish()`` call to the first poll of the store that
   sees the committed ``spike`` event of that reading (polled every 20 ms
   from another connection; each latency is overstated by at most one poll
   interval plus one query, both printed).
4. *Steady window*: the publishers go flat out again. After a warm-up the
   window runs from one ``store time`` log line of the service to the first
   one after ``--window`` seconds (``--summary-interval 5``, so the window
   is whole store-time intervals). Over it, sampled every 0.5 s and fitted by least squares:
   the service's rate (readings committed to its journal: each reading that
   went through the engine and was committed with the events, which is when
   the service acknowledges it; repeats are never journaled), the bare
   client's rate (messages received and parsed), the publishers' rate
   (PUBACKs), and CPU per process from ``/proc``. The store time shares are
   the sums of the service's own ``store time`` lines over the window
   (:mod:`leadline.adapters.store.timing`: events = alarm events and
   evidence; journal = accepted readings, their counts and offsets;
   snapshots = feed snapshots with journal truncation, and checkpoints;
   status = feed status rows and heartbeat; commit = begin and commit).

Settings and why (``e2e_site.CONFIG``): white noise with a constant
(``model = { order = [0, 0, 0] }``) fits in closed form, no statsmodels
optimisation, so ten thousand fits take seconds in one refit worker; the
``sigma`` threshold mode sets limits without run-length searches;
``train_points = 50`` (the least allowed) and ``install_delay_slots = 0``
bring a feed to ``watching`` after 51 readings; the data are white noise,
so the model is right and the spike rule has a clean z to score. Readings
are one minute apart in reading time, starting a year before now (so no
reading is in the future for the live wall clock); ``stale_intervals`` is
a million intervals, because the stale rule runs on the wall clock and the
readings are old; scheduled refits every ten years and no diagnostics
refits, so no fit falls in a window; snapshots every 30 s (the default).

"limited by": *service* when it took under 90% of what the publishers got
through the broker (its queue at the broker grew), else *broker* when
Mosquitto (one thread) used 90% or more of a core, else *publisher* (the
service kept up with everything published). Figures come from one run on
a 2-core machine; the other processes of the benchmark (publishers, broker,
bare client, PostgreSQL) share those cores with the service, so a ratio is
the honest output, not an absolute rate.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import os
import signal
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
for _path in (str(HERE), str(HERE.parent)):  # this folder (e2e_*), tests/ (mqtt_broker)
    if _path not in sys.path:
        sys.path.insert(0, _path)

import numpy as np  # noqa: E402

from e2e_clients import Publishers, feed_of  # noqa: E402
from e2e_site import (PgDatabase, ServiceProcess, StoreProbe, cpu_seconds, machine_busy_s,  # noqa: E402
                      parse_store_time, pg_reachable, pids_named, utc_now_s, write_config)
from mqtt_broker import MosquittoBroker, mosquitto_binary  # noqa: E402

PARTS = ("events", "journal", "snapshots", "status", "commit", "other")


@dataclass(frozen=True)
class Plan:
    """How long each phase runs (module docstring)."""

    window_s: float = 30.0
    summary_interval_s: float = 5.0
    warmup_s: float = 3.0
    publisher_alone_s: float = 5.0
    spikes: int = 20
    spike_gap_s: float = 0.5
    publishers: int = 3
    train_points: int = 50
    snapshot_interval_s: float = 30.0
    poll_s: float = 0.02
    latency_load: float = 0.1
    sample_s: float = 0.5


FULL = Plan()
QUICK = Plan(window_s=20.0, publisher_alone_s=5.0, spikes=10)


@dataclass
class CaseResult:
    feeds: int
    store: str
    service_rate: float = math.nan
    bare_rate: float = math.nan
    publisher_rate: float = math.nan
    publisher_alone_rate: float = math.nan
    bare_alone_rate: float = math.nan
    learning_rate: float = math.nan
    learning_s: float = math.nan
    latency_load_rate: float = math.nan
    latencies_s: list[float] = field(default_factory=list)
    spikes_planted: int = 0
    poll_query_s: float = math.nan
    window_s: float = math.nan
    store_seconds: dict[str, float] = field(default_factory=dict)
    store_window_s: float = 0.0
    flushes: int = 0
    cpu_pct: dict[str, float] = field(default_factory=dict)
    machine_busy_pct: float = math.nan
    queue_growth: float = math.nan
    limited_by: str = "?"
    reason: str = ""

    @property
    def ratio(self) -> float:
        return self.service_rate / self.bare_rate

    def latency_ms(self, q: float) -> float:
        return 1000 * float(np.quantile(self.latencies_s, q)) if self.latencies_s else math.nan

    def share(self, part: str) -> float:
        total = sum(self.store_seconds.values())
        return 100 * self.store_seconds.get(part, 0.0) / total if total else math.nan

    @property
    def store_busy_pct(self) -> float:
        return 100 * sum(self.store_seconds.values()) / self.store_window_s if self.store_window_s else math.nan


def _wait(condition, timeout_s: float, what: str, tick_s: float = 0.2, on_tick=None):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        result = condition()
        if result:
            return result
        if on_tick is not None:
            on_tick()
        time.sleep(tick_s)
    raise TimeoutError(f"timed out after {timeout_s:g} s waiting for {what}")


def _slope(samples: list[tuple[float, float]]) -> float:
    t, y = np.array(samples, dtype=float).T
    return float(np.polyfit(t - t[0], y, 1)[0])


class Cpu:
    """CPU seconds of each party at one instant (``/proc``)."""

    def __init__(self, parties: dict[str, list[int]]) -> None:
        self.parties = parties

    def take(self) -> dict[str, float]:
        out = {name: cpu_seconds(pids) for name, pids in self.parties.items()}
        out["machine"] = machine_busy_s()[0]
        return out


def publishers_alone(pubs: Publishers, cpu: Cpu, seconds: float, result: CaseResult) -> None:
    pubs.begin()
    time.sleep(min(1.0, seconds / 4))
    t0, a0, r0, c0 = time.monotonic(), pubs.acked_total(), pubs.received_total(), cpu.take()
    time.sleep(seconds)
    t1, a1, r1, c1 = time.monotonic(), pubs.acked_total(), pubs.received_total(), cpu.take()
    pubs.finish()
    result.publisher_alone_rate = (a1 - a0) / (t1 - t0)
    result.bare_alone_rate = (r1 - r0) / (t1 - t0)
    print(f"  publishers alone ({pubs.n_publishers} processes, bare client subscribed): "
          f"{result.publisher_alone_rate:,.0f} msg/s acked, bare client {result.bare_alone_rate:,.0f} msg/s; "
          f"CPU publishers {100 * (c1['publishers'] - c0['publishers']) / (t1 - t0):.0f}%, "
          f"broker {100 * (c1['broker'] - c0['broker']) / (t1 - t0):.0f}% of a core", flush=True)


def learn(pubs: Publishers, probe: StoreProbe, service: ServiceProcess, plan: Plan, base: int,
          result: CaseResult) -> None:
    start = time.monotonic()
    pubs.begin(messages_per_feed=plan.train_points + 2)
    pubs.finish()
    target = pubs.acked_total() - base
    _wait(lambda: probe.journaled() >= target, 1800, "the learning readings journaled",
          on_tick=lambda: _check_alive(service))
    result.learning_rate = target / (time.monotonic() - start)
    _wait(lambda: probe.watching() >= result.feeds, 1800, "every feed watching", on_tick=lambda: _check_alive(service))
    result.learning_s = time.monotonic() - start
    print(f"  learning: {target:,} readings, every feed watching after {result.learning_s:.0f} s "
          f"({result.learning_rate:,.0f} readings/s journaled while learning)", flush=True)


def _check_alive(service: ServiceProcess) -> None:
    if not service.alive():
        raise RuntimeError(f"leadline run exited with {service.process.returncode}:\n{service.tail()}")


def latency(pubs: Publishers, probe: StoreProbe, service: ServiceProcess, plan: Plan, base: int,
            result: CaseResult) -> None:
    n = min(plan.spikes, result.feeds)
    planted = [(i * result.feeds) // n for i in range(n)]
    ids = [feed_of(k) for k in planted]
    before = probe.spike_starts(ids)
    result.latency_load_rate = max(100.0, plan.latency_load * result.learning_rate)
    # Gaps drawn from [gap, 2 gap): spikes at a fixed gap would fall at the same phase of the flush timer.
    gaps = plan.spike_gap_s * (1.0 + np.random.default_rng(result.feeds).random(n))
    at = time.monotonic() + 1.0 + np.cumsum(gaps)
    pubs.begin(rate=result.latency_load_rate, spikes={k: float(t) for k, t in zip(planted, at)})
    seen: dict[tuple[str, float], float] = {}
    queries = []
    deadline = float(at[-1]) + 30.0
    while time.monotonic() < deadline:
        t_query = time.monotonic()
        found = probe.spike_starts(ids) - before
        t_seen = time.monotonic()
        queries.append(t_seen - t_query)
        for key in found:
            seen.setdefault(key, t_seen)
        if len({f for f, _ in seen}) >= n:
            break
        time.sleep(max(0.0, plan.poll_s - (time.monotonic() - t_query)))
    replies = pubs.finish()
    result.poll_query_s = statistics.median(queries)
    result.spikes_planted = sum(len(r["planted"]) for r in replies)
    for reply in replies:
        for k, step, t_pub in reply["planted"]:
            key = (feed_of(k), float(pubs.t0_s + 60 * step))
            if key in seen:
                result.latencies_s.append(seen[key] - t_pub)
    target = pubs.acked_total() - base
    _wait(lambda: probe.journaled() >= target, 600, "the service to catch up after the latency phase",
          on_tick=lambda: _check_alive(service))
    print(f"  latency: {len(result.latencies_s)} of {result.spikes_planted} planted spikes committed as events, "
          f"median {result.latency_ms(0.5):.0f} ms, p99 {result.latency_ms(0.99):.0f} ms "
          f"(background {result.latency_load_rate:,.0f} msg/s; poll every {1000 * plan.poll_s:.0f} ms, "
          f"query {1000 * result.poll_query_s:.1f} ms)", flush=True)


def steady(pubs: Publishers, probe: StoreProbe, service: ServiceProcess, cpu: Cpu, plan: Plan,
           result: CaseResult) -> None:
    service.new_lines()
    pubs.begin()
    warm_until = time.monotonic() + plan.warmup_s

    def next_store_time() -> dict[str, float]:
        while True:
            _check_alive(service)
            for line in service.new_lines():
                fields = parse_store_time(line)
                if fields is not None:
                    return fields
            time.sleep(0.02)

    while True:  # the window starts at a store time line after the warm-up
        next_store_time()
        if time.monotonic() >= warm_until:
            break
    t_start, c_start = time.monotonic(), cpu.take()
    samples = []
    lines: list[dict[str, float]] = []
    next_sample = t_start
    # ...and ends at the first store time line once window_s has passed (a line comes late when the loop is busy).
    while True:
        _check_alive(service)
        now = time.monotonic()
        if now >= next_sample:
            samples.append((now, probe.journaled(), pubs.received_total(), pubs.acked_total()))
            next_sample += plan.sample_s
        pending = [f for f in map(parse_store_time, service.new_lines()) if f is not None]
        if pending and time.monotonic() - t_start >= plan.window_s:
            lines += pending
            break
        lines += pending
        time.sleep(0.02)
    t_end, c_end = time.monotonic(), cpu.take()
    samples.append((t_end, probe.journaled(), pubs.received_total(), pubs.acked_total()))
    pubs.finish()
    span = t_end - t_start
    result.window_s = span
    result.service_rate = _slope([(t, j) for t, j, _, _ in samples])
    result.bare_rate = _slope([(t, r) for t, _, r, _ in samples])
    result.publisher_rate = _slope([(t, a) for t, _, _, a in samples])
    result.queue_growth = (samples[-1][3] - samples[0][3]) - (samples[-1][1] - samples[0][1])
    result.cpu_pct = {k: 100 * (c_end[k] - c_start[k]) / span for k in c_start if k != "machine"}
    result.machine_busy_pct = 100 * (c_end["machine"] - c_start["machine"]) / span / 2
    result.store_seconds = {p: sum(f[f"{p}_s"] for f in lines) for p in PARTS}
    result.store_window_s = sum(f["window_s"] for f in lines)
    result.flushes = int(sum(f["flushes"] for f in lines))
    judge(result)


def judge(r: CaseResult) -> None:
    broker_cpu = r.cpu_pct.get("broker", 0.0)
    if r.service_rate < 0.9 * r.publisher_rate:
        r.limited_by = "service"
        r.reason = (f"the publishers got {r.publisher_rate:,.0f} msg/s through the broker and the bare client took "
                    f"{r.bare_rate:,.0f}/s, the service {r.service_rate:,.0f}/s: its queue at the broker grew by "
                    f"{r.queue_growth:,.0f} messages over the window")
    elif broker_cpu >= 90:
        r.limited_by = "broker"
        r.reason = (f"the service kept up ({r.service_rate:,.0f} of {r.publisher_rate:,.0f} msg/s) and Mosquitto "
                    f"used {broker_cpu:.0f}% of its one core")
    else:
        r.limited_by = "publisher"
        r.reason = (f"the service kept up with all that was published ({r.service_rate:,.0f} of "
                    f"{r.publisher_rate:,.0f} msg/s); the publishers used {r.cpu_pct.get('publishers', 0):.0f}% "
                    f"CPU, the broker {broker_cpu:.0f}%")
    r.reason += f"; machine {r.machine_busy_pct:.0f}% busy (2 cores)"


def run_case(feeds: int, store: str, plan: Plan, folder: Path) -> CaseResult:
    """One number of feeds on one store, every phase (module docstring)."""
    result = CaseResult(feeds, store)
    folder.mkdir(parents=True, exist_ok=True)
    pg = PgDatabase().create() if store == "postgresql" else None
    url = pg.url if pg else f"sqlite:///{folder / 'leadline.db'}"
    broker = MosquittoBroker(folder / "broker", max_queued_messages=3_000_000, max_inflight_messages=1000,
                             persistence=False).start()
    pubs = service = probe = None
    try:
        t0_s = (utc_now_s() // 60) * 60 - 365 * 86400
        pubs = Publishers(broker.port, feeds, plan.publishers, t0_s).start()
        parties = {"publishers": pubs.pids, "broker": [broker._process.pid], "bare": [pubs.bare.pid]}
        publishers_alone(pubs, Cpu(parties), plan.publisher_alone_s, result)
        config = write_config(folder / "leadline.toml", url=url, port=broker.port, train_points=plan.train_points,
                              snapshot_interval_s=plan.snapshot_interval_s)
        service = ServiceProcess(config, folder / "service.log", plan.summary_interval_s)
        service.start()
        parties["service"] = [service.pid]
        probe = StoreProbe(url)
        base = pubs.acked_total()
        learn(pubs, probe, service, plan, base, result)
        latency(pubs, probe, service, plan, base, result)
        if pg is not None:
            parties["postgres"] = pids_named("postgres")  # the server and every backend open now
        steady(pubs, probe, service, Cpu(parties), plan, result)
        print(f"  steady window {result.window_s:.0f} s: service {result.service_rate:,.0f} readings/s, bare client "
              f"{result.bare_rate:,.0f}/s ({result.ratio:.0%}), publishers {result.publisher_rate:,.0f}/s; "
              "CPU % of a core: " + ", ".join(f"{k} {v:.0f}" for k, v in result.cpu_pct.items()), flush=True)
    finally:
        if probe is not None:
            probe.close()
        if service is not None:
            status = service.stop()
            if status != 0:
                print(f"  leadline run exited with {status}:\n{service.tail()}")
        if pubs is not None:
            pubs.close()
        broker.stop()
        if pg is not None:
            pg.drop()
    return result


def table(results: list[CaseResult]) -> list[str]:
    head = (f"{'feeds':>6}  {'store':<10} {'service/s':>9} {'bare/s':>8} {'ratio':>5} {'pub alone/s':>11} "
            f"{'latency ms med/p99':>18} {'store busy':>10}  " + " ".join(f"{p:>9}" for p in PARTS) + "  limited by")
    rows = [head, "-" * len(head)]
    for r in results:
        latency_text = f"{r.latency_ms(0.5):.0f} / {r.latency_ms(0.99):.0f}"
        rows.append(f"{r.feeds:>6,}  {r.store:<10} {r.service_rate:>9,.0f} {r.bare_rate:>8,.0f} {r.ratio:>5.0%} "
                    f"{r.publisher_alone_rate:>11,.0f} {latency_text:>18} {r.store_busy_pct:>9.0f}%  "
                    + " ".join(f"{r.share(p):>8.1f}%" for p in PARTS) + f"  {r.limited_by}")
    return rows


def main(argv: list[str] | None = None) -> int:
    signal.signal(signal.SIGTERM, lambda signum, frame: sys.exit(143))  # clean up brokers, services, databases
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--feeds", type=int, nargs="+", help="numbers of feeds (default 1000 10000; --quick 200)")
    parser.add_argument("--store", choices=["sqlite", "postgresql", "both"], default="both")
    parser.add_argument("--quick", action="store_true", help="200 feeds, 20 s windows, 10 spikes")
    parser.add_argument("--spikes", type=int, help="spikes planted per case (default 20; --quick 10)")
    parser.add_argument("--publishers", type=int, help="publisher processes (default 3)")
    parser.add_argument("--window", type=float, help="steady window in seconds (default 30; --quick 20)")
    parser.add_argument("--workdir", type=Path, help="keep the stores, configs and logs here (default: a temporary "
                                                      "folder, removed)")
    args = parser.parse_args(argv)
    if mosquitto_binary() is None:
        print("skipped: no mosquitto binary (apt-get install mosquitto)")
        return 1
    plan = QUICK if args.quick else FULL
    changes = {"spikes": args.spikes, "window_s": args.window, "publishers": args.publishers}
    plan = dataclasses.replace(plan, **{k: v for k, v in changes.items() if v is not None})
    feeds = args.feeds or ([200] if args.quick else [1000, 10000])
    stores = ["sqlite", "postgresql"] if args.store == "both" else [args.store]
    if "postgresql" in stores and (why := pg_reachable()) is not None:
        print(f"PostgreSQL left out: the local server at 127.0.0.1:5432 is not reachable ({why})")
        stores.remove("postgresql")
    load = Path("/proc/loadavg").read_text().split()[:3]
    print(f"leadline end to end; load average at start {' '.join(load)} on {len(os.sched_getaffinity(0))}"
          f" cores (shared: other work runs beside it)")
    started = time.monotonic()
    results = []
    with tempfile.TemporaryDirectory(prefix="leadline-e2e-") as tmp:
        for n in feeds:
            for store in stores:
                print(f"{n:,} feeds, {store}:", flush=True)
                results.append(run_case(n, store, plan, (args.workdir or Path(tmp)) / f"{n}-{store}"))
    print()
    for line in table(results):
        print(line)
    print()
    for r in results:
        print(f"{r.feeds:,} feeds, {r.store}: limited by {r.limited_by}: {r.reason}")
    print(f"target: service >= 85% of the bare client; store time shares over the steady window "
          f"(snapshots every {plan.snapshot_interval_s:g} s); total {time.monotonic() - started:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
