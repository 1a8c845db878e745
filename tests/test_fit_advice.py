"""Fit problems carry their likely remedy, and ``leadline score`` prints both."""

from __future__ import annotations

import subprocess
import sys

import numpy as np

from leadline.detector.fit_diagnostics import assess
from leadline.detector.fitting import fit
from leadline.detector.seasonality import DAY_S, CalendarTerms, SeasonalPeriod
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec

START = 1_780_000_000.0


def daily_feed(days: int = 8, seed: int = 3):
    """An invented 15-minute feed with a daily cycle (amplitude 2) over AR(1) noise (sd 0.5)."""
    epoch = START + 900.0 * np.arange(days * 96)
    y = 20.0 + 2.0 * np.sin(2 * np.pi * epoch / DAY_S) + simulate_arima(epoch.size, ar=[0.5], sigma=0.5, seed=seed)
    return epoch, y


def kinds(model) -> set[str]:
    return {p.kind for p in model.advice}


def test_an_unmodelled_daily_cycle_is_named_with_its_remedy():
    epoch, y = daily_feed()
    model = fit(y, ModelSpec.ar(1), timestamps_epoch_s=epoch)
    daily = next(p for p in model.advice if p.kind == "daily cycle")
    assert "a daily cycle is not modelled" in daily.remedy and "96 slots" in daily.text
    assert model.params["ar.L1"] > 0.8  # the AR(1) soaked much of the cycle into its level
    assert daily.text in model.problems
    with_terms = fit(y, ModelSpec.ar(1), calendar=CalendarTerms((SeasonalPeriod(DAY_S, 1),)),
                     timestamps_epoch_s=epoch)
    assert "daily cycle" not in kinds(with_terms)


def test_a_wandering_level_fitted_without_a_difference_says_try_d_1():
    y = 100 + np.cumsum(simulate_arima(800, ar=[0.3], seed=14))
    model = fit(y, ModelSpec.ar(1))
    root = next(p for p in model.advice if p.kind == "unit root")
    assert root.remedy == "try d = 1"
    assert "unit root" not in kinds(fit(y, ModelSpec.arima(1, 1, 0)))


def test_not_converged_and_an_off_variance_ratio_are_reported():
    z = np.random.default_rng(2).normal(0.0, 2.0, 500)  # residuals with 4 times the model's variance
    advice = assess(z, spec=ModelSpec.ar(1), params={"ar.L1": 0.2}, converged=False, lb_pvalue=0.5, lb_lag=10)
    by_kind = {p.kind: p for p in advice}
    assert "did not converge" in by_kind["not converged"].text and by_kind["not converged"].remedy
    assert "variance" in by_kind["variance ratio"].text
    clean = assess(z / 2.0, spec=ModelSpec.ar(1), params={"ar.L1": 0.2}, converged=True, lb_pvalue=0.5,
                   lb_lag=10)
    assert clean == ()


def test_a_change_of_variance_inside_the_window_is_reported():
    rng = np.random.default_rng(6)
    z = np.r_[rng.normal(0, 0.6, 300), rng.normal(0, 1.3, 300)]
    advice = assess(z, spec=ModelSpec.white_noise(), params={}, converged=True, lb_pvalue=0.5, lb_lag=10)
    assert "variance change" in {p.kind for p in advice}


def score(*args: str) -> subprocess.CompletedProcess:
    """``leadline score`` as a user runs it, its printed summary on standard error."""
    return subprocess.run([sys.executable, "-m", "leadline.adapters.cli", "score", *args],
                          capture_output=True, text=True, timeout=300)


def write_csv(path, epoch, y) -> str:
    lines = ["timestamp,value"] + [f"{int(t)},{float(v)!r}" for t, v in zip(epoch, y)]
    path.write_text("\n".join(lines) + "\n")
    return str(path)


def test_score_prints_problems_with_their_remedies(tmp_path):
    epoch, y = daily_feed()
    result = score(write_csv(tmp_path / "feed.csv", epoch, y), "--train", "600", "--order", "1,0,0",
                   "--threshold-mode", "sigma", "--out", str(tmp_path / "out.csv"))
    assert result.returncode == 0, result.stderr
    assert "fit problem: the residuals still follow a daily cycle" in result.stderr
    assert "remedy: a daily cycle is not modelled" in result.stderr


def test_score_takes_a_time_zone_and_refuses_an_unknown_one(tmp_path):
    epoch, y = daily_feed(days=4)
    args = [write_csv(tmp_path / "feed.csv", epoch, y), "--train", "300", "--order", "1,0,0",
            "--seasonality", "1d:1", "--threshold-mode", "sigma", "--out", str(tmp_path / "out.csv")]
    result = score(*args, "--timezone", "Europe/London")
    assert result.returncode == 0, result.stderr
    assert "fitted daily cycle, 1 harmonic; AR(1) + const" in result.stderr
    bad = score(*args, "--timezone", "Mars/Olympus")
    assert bad.returncode == 2 and "Mars/Olympus" in bad.stderr and "Traceback" not in bad.stderr
