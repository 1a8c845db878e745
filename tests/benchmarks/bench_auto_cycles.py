""""auto" on 14 days of 15-minute data, with and without a daily cycle: fit time and table size.

Run: ``python tests/benchmarks/bench_auto_cycles.py``. Invented feeds: AR(1) noise (phi 0.6,
sd 0.5) around 50, and the same plus a daily cycle (amplitude 3 and 1.5 on the first two
harmonics). The default "auto" path (timestamps given, so it looks for daily and weekly cycles)
should take well under 10 s. Both wall time and process CPU time are printed: on a shared
machine the wall time says more about the other users than about the fit. Run it with one BLAS
thread (``OPENBLAS_NUM_THREADS=1``), as the service's refit workers do.
"""

from __future__ import annotations

import os
import time

import numpy as np

from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima

DAY_S = 86400.0


def main() -> None:
    n = 14 * 96
    epoch = 1_780_000_000.0 + 900.0 * np.arange(n)
    noise = 50 + simulate_arima(n, ar=[0.6], sigma=0.5, seed=3)
    daily = 3 * np.sin(2 * np.pi * epoch / DAY_S) + 1.5 * np.cos(4 * np.pi * epoch / DAY_S)
    print(f"load average {os.getloadavg()[0]:.1f}; OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}")
    for name, y in (("no cycle", noise), ("daily cycle", noise + daily)):
        wall, cpu = time.perf_counter(), time.process_time()
        model = fit(y, "auto", timestamps_epoch_s=epoch)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        table = model.selection.candidates
        with_cycle = sum(1 for c in table if c.calendar_label)
        print(f"{name:12s} wall {wall:6.2f} s  cpu {cpu:6.2f} s  {len(table)} candidates "
              f"({with_cycle} with a cycle)  chose: {model.description}")


if __name__ == "__main__":
    main()
