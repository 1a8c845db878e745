"""Soak ``leadline run``: random SIGKILLs and broker restarts, compared with a clean run.

Usage (from the repository root)::

    python -m tests.soak.run --kills 100 --broker-restarts 20 --long-outage-s 60 --steps 20000

The runner starts its own Mosquitto on a free port (``tests/mqtt_broker.py``)
and drives the real ``leadline run --replay`` as a subprocess, fed by a
followed CSV file and MQTT QoS 1 messages (:mod:`.scenario`). It first runs
the service once undisturbed on the whole input (the *clean* run), then
again on the same input, paced, while it SIGKILLs the service at random
moments (the first two while the feeds are still learning, a quarter as soon as
SQLite's WAL file changes, i.e. while a flush writes, a quarter just after a
refit was requested, the rest at random times), restarts it, and restarts the broker (one of them a long outage). At
the end it compares the two stores' events and prints:

- lost / extra: episodes (feed, rule, start) of one run missing in the other;
- changed: the same episode with another end or peak |z|;
- stuck active: an episode still open in the disturbed run but closed in the clean one;
- exactly once: the journal's count of readings per feed against the input;
- the final CSV offsets against the file's size.

All counts must be 0 and every feed's count equal to the input.
"""

from __future__ import annotations

import argparse
import math
import os
import random
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from mqtt_broker import MosquittoBroker, QosOnePublisher  # noqa: E402

from leadline.adapters.store import open_store  # noqa: E402

from .scenario import CONFIG, START, STEP, Scenario, csv_rows, make_scenario, mqtt_messages  # noqa: E402


@dataclass
class SoakResult:
    lost: list = field(default_factory=list)
    extra: list = field(default_factory=list)
    changed: list = field(default_factory=list)
    stuck_active: list = field(default_factory=list)
    clean_events: int = 0
    journal_counts: dict = field(default_factory=dict)
    expected_count: int = 0
    offsets_ok: bool = False
    offsets: dict = field(default_factory=dict)
    kills: int = 0
    kills_learning: int = 0
    kills_after_refit_request: int = 0
    kills_in_flush: int = 0
    broker_restarts: int = 0
    longest_outage_s: float = 0.0
    elapsed_s: float = 0.0

    @property
    def exactly_once(self) -> bool:
        return bool(self.journal_counts) and all(n == self.expected_count for n in self.journal_counts.values())

    @property
    def passed(self) -> bool:
        return not (self.lost or self.extra or self.changed or self.stuck_active) and self.exactly_once \
            and self.offsets_ok

    def lines(self) -> list[str]:
        return [
            f"kills={self.kills} (learning {self.kills_learning}, just after a refit request "
            f"{self.kills_after_refit_request}, as the WAL grew {self.kills_in_flush}) broker_restarts={self.broker_restarts} "
            f"longest_outage_s={self.longest_outage_s:g} elapsed_s={self.elapsed_s:.0f}",
            f"events clean={self.clean_events} lost={len(self.lost)} extra={len(self.extra)} "
            f"changed={len(self.changed)} stuck_active={len(self.stuck_active)}",
            "exactly once: " + " ".join(f"{f}={n}/{self.expected_count}" for f, n in sorted(self.journal_counts.items())),
            "final offsets: " + " ".join(f"{Path(p).name}={o}" for p, o in self.offsets.items())
            + f" ({'at the end of the file' if self.offsets_ok else 'NOT at the end of the file'})",
        ] + [f"  lost {x}" for x in self.lost[:10]] + [f"  extra {x}" for x in self.extra[:10]] \
          + [f"  changed {x}" for x in self.changed[:10]] + [f"  stuck {x}" for x in self.stuck_active[:10]]


class Site:
    """One store, one followed CSV, one broker, and the service process."""

    def __init__(self, folder: Path, scenario: Scenario, *, snapshot_interval_s: float, refit_every: str):
        self.folder = folder
        self.scenario = scenario
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "export").mkdir(exist_ok=True)
        self.broker = MosquittoBroker(folder / "broker").start()
        (folder / "leadline.toml").write_text(CONFIG.format(port=self.broker.port, refit_every=refit_every,
                                                            snapshot_interval_s=snapshot_interval_s))
        self.csv = folder / "export" / "saltmere.csv"
        self.csv.write_text("timestamp,feed,value\n")
        self.log = folder / "service.log"
        self.log.touch()
        self.process: subprocess.Popen | None = None

    def log_text(self) -> str:
        return self.log.read_text(errors="replace")

    def start_service(self) -> None:
        before = self.log_text().count("subscribing to")
        with self.log.open("a") as out:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "leadline.adapters.cli", "run", "--config", str(self.folder / "leadline.toml"),
                 "--replay"], stdout=out, stderr=subprocess.STDOUT, env={**os.environ, "PYTHONUNBUFFERED": "1"})
        # MQTT messages are queued for the persistent session only once it subscribed.
        wait_for(lambda: self.log_text().count("subscribing to") > before or self.process.poll() is not None,
                 60, "the service's subscription")
        if self.process.poll() is not None:
            raise RuntimeError(f"leadline run exited with {self.process.returncode}:\n{self.log_text()[-3000:]}")

    def kill_service(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(timeout=30)

    def stop_service(self) -> int:
        assert self.process is not None
        self.process.send_signal(signal.SIGTERM)
        return self.process.wait(timeout=120)

    def append_csv(self, rows: range) -> None:
        with self.csv.open("a") as handle:
            handle.write(csv_rows(self.scenario, rows))

    def journal_counts(self) -> dict[str, int]:
        store = open_store(f"sqlite:///{self.folder / 'leadline.db'}")
        try:
            return store.journal_counts()
        finally:
            store.close()

    def wait_all_journaled(self, timeout_s: float) -> None:
        n = self.scenario.steps
        wait_for(lambda: (c := self._counts_or_none()) is not None and len(c) == 4
                 and all(v >= n for v in c.values()), timeout_s, "every reading journaled")

    def _counts_or_none(self) -> dict[str, int] | None:
        try:
            return self.journal_counts()
        except Exception:  # noqa: BLE001 - the store may not exist yet
            return None

    def results(self) -> tuple[dict, dict[str, int], dict[str, int]]:
        store = open_store(f"sqlite:///{self.folder / 'leadline.db'}")
        try:
            until = START + (self.scenario.steps + 10) * STEP
            events = {(e.event.feed_id, e.event.rule, e.event.start): e.event
                      for e in store.events(since=START - STEP, until=until)}
            offsets = {o.path: o.offset_bytes for o in store.load_offsets("saltmere-export").values()}
            return events, store.journal_counts(), offsets
        finally:
            store.close()

    def close(self) -> None:
        self.kill_service()
        self.broker.stop()


def wait_for(condition, timeout_s: float, what: str) -> Any:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        result = condition()
        if result:
            return result
        time.sleep(0.2)
    raise TimeoutError(f"timed out after {timeout_s:g} s waiting for {what}")


def publish_all(port: int, messages: list[tuple[str, str]], client_id: str) -> None:
    publisher = QosOnePublisher(port, client_id=client_id)
    for topic, payload in messages:
        publisher.publish(topic, payload)
    if not publisher.wait_all(120.0):
        raise TimeoutError("the clean run's messages were not all acknowledged by the broker")
    publisher.close()


def clean_run(scenario: Scenario, folder: Path, **site_options: Any) -> dict:
    """The undisturbed run: the whole input at once; returns its events."""
    site = Site(folder, scenario, **site_options)
    try:
        site.start_service()
        publish_all(site.broker.port, mqtt_messages(scenario, range(scenario.steps)), "soak-clean-publisher")
        site.append_csv(range(scenario.steps))
        site.wait_all_journaled(600)
        time.sleep(2.0)
        if site.stop_service() != 0:
            raise RuntimeError(f"the clean run did not stop cleanly:\n{site.log_text()[-3000:]}")
        return site.results()[0]
    finally:
        site.close()


class Feeder(threading.Thread):
    """Writes the input at ``steps_per_s``: CSV rows appended, MQTT messages published (QoS 1)."""

    def __init__(self, site: Site, steps_per_s: float, block: int = 5):
        super().__init__(daemon=True, name="soak-feeder")
        self.site, self.steps_per_s, self.block = site, steps_per_s, block
        self.publisher = QosOnePublisher(site.broker.port, client_id="soak-publisher", max_inflight=1000)
        self.done = threading.Event()
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            n = self.site.scenario.steps
            t0 = time.monotonic()
            for first in range(0, n, self.block):
                rows = range(first, min(n, first + self.block))
                for topic, payload in mqtt_messages(self.site.scenario, rows):
                    self.publisher.publish(topic, payload)
                self.site.append_csv(rows)
                delay = t0 + rows.stop / self.steps_per_s - time.monotonic()
                if delay > 0:
                    time.sleep(delay)
            if not self.publisher.wait_all(600.0):
                raise TimeoutError("the broker did not acknowledge every published message")
        except BaseException as exc:  # noqa: BLE001 - reported by the runner
            self.error = exc
        finally:
            self.done.set()


def chaos_run(scenario: Scenario, folder: Path, *, kills: int, broker_restarts: int, long_outage_s: float,
              seed: int, steps_per_s: float, **site_options: Any) -> tuple[dict, dict, dict, SoakResult]:
    """The disturbed run; returns its events, journal counts, offsets and what was done."""
    rng = random.Random(seed)
    result = SoakResult()
    site = Site(folder, scenario, **site_options)
    # The first two kills come while the feeds are still learning; the rest and the broker restarts are shuffled.
    early = min(kills, 2)
    actions = ["kill"] * (kills - early) + ["broker"] * broker_restarts
    rng.shuffle(actions)
    actions = ["kill-learning"] * early + actions
    long_index = next((i for i, a in enumerate(actions) if a == "broker"), None) if long_outage_s > 0 else None
    feeder = Feeder(site, steps_per_s)
    try:
        site.start_service()
        feeder.start()
        for i, action in enumerate(actions):
            if action == "kill-learning":
                time.sleep(rng.uniform(0.3, 1.5))
                if "state old=fitting new=watching" not in site.log_text() and "new=watching" not in site.log_text():
                    result.kills_learning += 1
                site.kill_service()
                result.kills += 1
                site.start_service()
            elif action == "kill":
                draw = rng.random()
                if draw < 0.25:
                    # during a flush: as soon as SQLite's WAL file changes, a write transaction is under way
                    wal = site.folder / "leadline.db-wal"
                    before = _file_state(wal)
                    deadline = time.monotonic() + 10.0
                    while _file_state(wal) == before and time.monotonic() < deadline:
                        time.sleep(0.0005)
                    if _file_state(wal) != before:
                        result.kills_in_flush += 1
                elif draw < 0.5:
                    # just after a refit was requested: the fit is in the pool when the service dies
                    count = site.log_text().count("refit requested")
                    try:
                        wait_for(lambda: site.log_text().count("refit requested") > count, 15, "a refit request")
                        result.kills_after_refit_request += 1
                    except TimeoutError:
                        pass
                else:
                    time.sleep(rng.uniform(0.2, 3.0))
                site.kill_service()
                result.kills += 1
                time.sleep(rng.uniform(0.0, 0.5))
                site.start_service()
            else:
                time.sleep(rng.uniform(0.5, 2.0))
                down_s = long_outage_s if i == long_index else rng.uniform(0.2, 3.0)
                site.broker.restart(down_s=down_s)
                result.broker_restarts += 1
                result.longest_outage_s = max(result.longest_outage_s, round(down_s, 1))
        feeder.done.wait(3600)
        if feeder.error is not None:
            raise RuntimeError(f"the feeder failed: {feeder.error!r}")
        if site.process is None or site.process.poll() is not None:
            site.start_service()
        site.wait_all_journaled(900)
        time.sleep(2.0)
        if site.stop_service() != 0:
            raise RuntimeError(f"the disturbed run did not stop cleanly:\n{site.log_text()[-3000:]}")
        events, counts, offsets = site.results()
        offsets_ok = offsets.get(str(site.csv)) == site.csv.stat().st_size or \
            list(offsets.values()) == [site.csv.stat().st_size]
        result.offsets, result.offsets_ok = offsets, offsets_ok
        return events, counts, offsets, result
    finally:
        feeder.publisher.close()
        site.close()


def _file_state(path: Path) -> tuple[int, int]:
    try:
        st = path.stat()
    except OSError:
        return (-1, -1)
    return (st.st_size, st.st_mtime_ns)


def _peak(event) -> float:
    return event.peak_abs_z if event.peak_abs_z is not None else math.nan


def compare(clean: dict, chaos: dict, result: SoakResult) -> SoakResult:
    result.clean_events = len(clean)
    result.lost = sorted(k for k in clean if k not in chaos)
    result.extra = sorted(k for k in chaos if k not in clean)
    for key in sorted(set(clean) & set(chaos)):
        a, b = clean[key], chaos[key]
        if a.end is not None and b.end is None:
            result.stuck_active.append(key)
            continue
        pa, pb = _peak(a), _peak(b)
        same_peak = (math.isnan(pa) and math.isnan(pb)) or math.isclose(pa, pb, rel_tol=1e-9, abs_tol=1e-12)
        if a.end != b.end or not same_peak:
            result.changed.append((key, (a.end, pa), (b.end, pb)))
    return result


def soak(folder: Path, *, steps: int, kills: int, broker_restarts: int, long_outage_s: float, seed: int = 7,
         steps_per_s: float | None = None, snapshot_interval_s: float = 5.0, refit_every: str = "2h") -> SoakResult:
    """A clean run and a disturbed one on the same seeded input, compared (see the module docstring)."""
    scenario = make_scenario(steps, seed=2026 + seed)
    options = {"snapshot_interval_s": snapshot_interval_s, "refit_every": refit_every}
    t0 = time.monotonic()
    clean = clean_run(scenario, folder / "clean", **options)
    if steps_per_s is None:
        budget_s = 4.0 * kills + 2.5 * broker_restarts + long_outage_s + 5.0
        steps_per_s = max(20.0, steps / budget_s)
    chaos, counts, _, result = chaos_run(scenario, folder / "chaos", kills=kills, broker_restarts=broker_restarts,
                                         long_outage_s=long_outage_s, seed=seed, steps_per_s=steps_per_s,
                                         **options)
    result.journal_counts, result.expected_count = counts, steps
    result.elapsed_s = time.monotonic() - t0
    return compare(clean, chaos, result)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.soak.run", description=__doc__.split("\n\n")[0])
    parser.add_argument("--steps", type=int, default=20_000, help="1-minute steps per feed (default 20000)")
    parser.add_argument("--kills", type=int, default=100)
    parser.add_argument("--broker-restarts", type=int, default=20)
    parser.add_argument("--long-outage-s", type=float, default=60.0)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--steps-per-s", type=float, default=None, help="input pace (default: fits the actions)")
    parser.add_argument("--workdir", type=Path, default=None, help="default: a new temporary folder")
    args = parser.parse_args(argv)
    import tempfile

    folder = args.workdir or Path(tempfile.mkdtemp(prefix="leadline-soak-"))
    print(f"soak in {folder}", flush=True)
    result = soak(folder, steps=args.steps, kills=args.kills, broker_restarts=args.broker_restarts,
                  long_outage_s=args.long_outage_s, seed=args.seed, steps_per_s=args.steps_per_s)
    for line in result.lines():
        print(line)
    print("PASS" if result.passed else "FAIL")
    return 0 if result.passed else 1


if __name__ == "__main__":
    sys.exit(main())
