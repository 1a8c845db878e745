"""Regenerate the bundled example files: ``python -m leadline.adapters.examples.generate``.

booster-pressure.csv: discharge pressure (bar) of the invented Cobbleford
booster station, every 15 minutes for 28 days, an ARMA(1,1) around 4.2 bar.
Two faults are planted in the last week: a one-reading spike and a step
down of 0.25 bar (a valve left part-closed).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

from leadline.detector.simulate import simulate_arima

START = datetime(2026, 5, 4, tzinfo=timezone.utc)
INTERVAL = timedelta(minutes=15)


def booster_pressure(path: Path) -> None:
    n = 28 * 96
    bar = simulate_arima(n, ar=[0.7], ma=[0.2], mean=4.2, sigma=0.03, seed=2026)
    bar[2300] += 0.6
    bar[2500:] -= 0.25
    with path.open("w", encoding="utf-8") as handle:
        handle.write("timestamp,value\n")
        for i, value in enumerate(bar):
            handle.write(f"{(START + i * INTERVAL).isoformat().replace('+00:00', 'Z')},{value:.4f}\n")


if __name__ == "__main__":
    here = Path(__file__).parent
    booster_pressure(here / "booster-pressure.csv")
