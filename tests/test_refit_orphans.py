"""A SIGKILL of ``leadline run`` takes its refit workers with it (no orphan re-parented to PID 1).

The refit pool's worker initializer sets the Linux parent-death signal
(prctl(2), ``PR_SET_PDEATHSIG``); this test kills the real service process
with SIGKILL once its pool has a worker and checks that every child it had
is gone within a few seconds.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from leadline.adapters.service.refit_pool import die_with_parent, refit_pool
from leadline.detector.simulate import simulate_arima

START = datetime(2026, 3, 2, tzinfo=timezone.utc)
CONFIG = """\
[store]
url = "leadline.db"
flush_interval_s = 0.5

[[sources.csv]]
name = "marsh-export"
path = "export/*.csv"
from_start = true

[feeds.defaults]
interval = "1min"
train_points = 200
model = { order = [1, 0, 0] }
threshold_mode = "sigma"

[refit]
every = "30d"
workers = 1
"""

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the parent-death signal is Linux's")


def children_of(pid: int) -> list[int]:
    """Every process whose parent is ``pid`` (from /proc)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()
        if int(fields[1]) == pid:
            found.append(int(entry))
    return found


def alive(pid: int) -> bool:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat[stat.rindex(")") + 2] != "Z"


def test_sigkill_of_the_service_leaves_no_refit_worker(tmp_path):
    (tmp_path / "export").mkdir()
    (tmp_path / "leadline.toml").write_text(CONFIG)
    values = simulate_arima(400, ar=[0.5], mean=10.0, sigma=0.2, seed=11)
    with (tmp_path / "export" / "marsh.csv").open("w") as handle:
        handle.write("timestamp,feed,value\n")
        for i, v in enumerate(values):
            stamp = (START + timedelta(minutes=i)).isoformat().replace("+00:00", "Z")
            handle.write(f"{stamp},marsh/weir/level,{float(v)!r}\n")
    log = tmp_path / "service.log"
    with log.open("w") as out:
        process = subprocess.Popen([sys.executable, "-m", "leadline.adapters.cli", "run", "--config",
                                    str(tmp_path / "leadline.toml"), "--replay"], stdout=out, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 90
        while "model installed" not in log.read_text():
            assert process.poll() is None, log.read_text()
            assert time.monotonic() < deadline, "no model installed in time"
            time.sleep(0.2)
        workers = children_of(process.pid)
        assert workers, "the refit pool should have a worker process"
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=10)
    deadline = time.monotonic() + 5.0
    while any(alive(pid) for pid in workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not [pid for pid in workers if alive(pid)], "refit workers outlived the killed service"


def _report_parent() -> int:
    return os.getppid()


def test_pool_workers_run_the_initializer_and_see_their_parent():
    pool = refit_pool(1)
    try:
        assert pool.submit(_report_parent).result(timeout=60) == os.getpid()
    finally:
        pool.shutdown(wait=True)


def test_the_initializer_kills_a_worker_whose_parent_is_already_gone():
    code = ("import os; from leadline.adapters.service.refit_pool import die_with_parent; "
            "die_with_parent(os.getppid() + 1_000_000); print('survived')")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert result.returncode == -signal.SIGKILL and "survived" not in result.stdout
    assert callable(die_with_parent)
