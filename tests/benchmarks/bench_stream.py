"""Per-point cost of the recursive step, beside statsmodels, in one run.

Run: ``python tests/benchmarks/bench_stream.py`` (add ``--quick`` for a short run).
Prints microseconds per point and the ratios the model-core targets use:
Stream.update <= 2x the compiled batch filter; StreamBank at 10,000 series
<= 0.1x the batch filter per series-step; state memory < 1 KiB per series.
Absolute times vary on a shared machine; compare the ratios.
"""

from __future__ import annotations

import sys
import time
import warnings

import numpy as np
from statsmodels.tsa.statespace.sarimax import SARIMAX

from leadline.detector.bank import StreamBank
from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec


def best_of(repeats: int, func) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def main(quick: bool = False) -> None:
    n_train, n_stream = 1000, (5000 if quick else 20000)
    y = simulate_arima(n_train + n_stream, ar=[0.5, -0.2], ma=[0.3, 0.2], d=1, drift=0.05, seed=2026)
    spec = ModelSpec.arima(2, 1, 2, drift=True)
    model = fit(y[:n_train], spec)
    params = np.array(list(model.params.values()))
    tail = y[n_train:].tolist()

    def run_stream():
        update = model.stream().update
        for v in tail:
            update(v)

    t_stream = best_of(5, run_stream) / n_stream

    full = SARIMAX(y, order=spec.order, trend=spec.trend)
    full.update(params)
    t_batch = best_of(5, full.ssm.filter) / y.size

    warnings.simplefilter("ignore")
    base = SARIMAX(y[:n_train], order=spec.order, trend=spec.trend).filter(params)
    n_append = 30 if quick else 100
    start = time.perf_counter()
    res = base
    for v in y[n_train : n_train + n_append]:
        res = res.append([v])
    t_append = (time.perf_counter() - start) / n_append
    start = time.perf_counter()
    res = base
    for v in y[n_train : n_train + n_append * 5]:
        res = res.extend([v])
    t_extend = (time.perf_counter() - start) / (n_append * 5)

    print(f"ARIMA(2,1,2) + drift, {n_stream} streamed points, best of 5 where repeated")
    print(f"{'method':<40} {'us/point':>12} {'x batch':>10}")
    rows = [("statsmodels compiled batch filter", t_batch), ("leadline Stream.update", t_stream),
            ("statsmodels results.extend (1 point)", t_extend), ("statsmodels results.append (1 point)", t_append)]
    for name, t in rows:
        print(f"{name:<40} {t * 1e6:>12.3f} {t / t_batch:>10.3f}")
    n_steps = 50 if quick else 200
    values = np.array(y[n_train : n_train + n_steps])
    for n_series in (1000, 10000):
        bank = StreamBank([model.stream() for _ in range(n_series)])
        grid = np.repeat(values[:, None], n_series, axis=1)
        grid[::7, ::13] = np.nan  # some gaps so the full recursion also runs
        start = time.perf_counter()
        for row in grid:
            bank.update(row)
        t_bank = (time.perf_counter() - start) / (n_steps * n_series)
        print(f"{f'StreamBank, {n_series} series (per series-step)':<40} {t_bank * 1e6:>12.3f} "
              f"{t_bank / t_batch:>10.3f}   state {bank.nbytes_per_series:.0f} bytes/series")
    print(f"Stream.update vs extend: {t_extend / t_stream:.0f}x faster; vs append: {t_append / t_stream:.0f}x faster")
    print("targets: Stream.update <= 2x batch; StreamBank(10k) <= 0.1x batch; state < 1024 bytes/series")


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
