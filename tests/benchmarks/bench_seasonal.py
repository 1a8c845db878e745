"""Seasonal feed: fit time and per-point step cost beside the plain ARMA step, in one run.

Run: ``python tests/benchmarks/bench_seasonal.py``. A 28-day, 15-minute invented district flow
feed with a daily and a weekly cycle plus AR(1) noise. Targets: the calendar-terms step costs
no more than 2x the plain ARMA step; the fit takes under 10 s.
"""

from __future__ import annotations

import time

import numpy as np

from leadline.detector.fitting import fit
from leadline.detector.seasonality import CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec

DAY_S, WEEK_S = 86400.0, 604800.0


def main() -> None:
    n_train, n_stream = 28 * 96, 20000
    epoch = 1_780_000_000.0 + 900.0 * np.arange(n_train + n_stream)
    cycle = 3 * np.sin(2 * np.pi * epoch / DAY_S) + 1.5 * np.cos(4 * np.pi * epoch / DAY_S) \
        + 2 * np.sin(2 * np.pi * epoch / WEEK_S)
    y = 50 + cycle + simulate_arima(epoch.size, ar=[0.6], sigma=0.5, seed=99)
    fixed = CalendarTerms((SeasonalPeriod(DAY_S, 3), SeasonalPeriod(WEEK_S, 2)))
    chosen = CalendarTerms((SeasonalPeriod(DAY_S), SeasonalPeriod(WEEK_S)))

    start = time.perf_counter()
    seasonal = fit(y[:n_train], ModelSpec.ar(1), calendar=fixed, timestamps_epoch_s=epoch[:n_train])
    t_fit_fixed = time.perf_counter() - start
    start = time.perf_counter()
    picked = fit(y[:n_train], ModelSpec.ar(1), calendar=chosen, timestamps_epoch_s=epoch[:n_train])
    t_fit_chosen = time.perf_counter() - start
    plain = fit(y[:n_train], ModelSpec.ar(1))

    def per_point(model) -> float:
        best = float("inf")
        tail = y[n_train:].tolist()
        for _ in range(5):
            update = model.stream().update
            start = time.perf_counter()
            for v in tail:
                update(v)
            best = min(best, (time.perf_counter() - start) / len(tail))
        return best

    t_plain, t_seasonal = per_point(plain), per_point(seasonal)
    print(f"fit, 28 days x 96 slots, AR(1) + calendar (1d K=3, 7d K=2): {t_fit_fixed:.2f} s")
    print(f"fit with K chosen by AICc ({len(picked.harmonics_table)} fits; chose "
          f"{[p.harmonics for p in picked.calendar.periods]}): {t_fit_chosen:.2f} s")
    print(f"{'step':<32} {'us/point':>10} {'x plain':>8}")
    print(f"{'plain AR(1)':<32} {t_plain * 1e6:>10.3f} {1.0:>8.2f}")
    print(f"{'AR(1) + calendar terms':<32} {t_seasonal * 1e6:>10.3f} {t_seasonal / t_plain:>8.2f}")
    print("targets: calendar step <= 2x plain; fit < 10 s")


if __name__ == "__main__":
    main()
