"""Shared helpers of the engine tests: a seeded AR(1) feed and compact settings."""

from __future__ import annotations

import numpy as np

from leadline.detector.feed_settings import FeedSettings
from leadline.detector.spec import ModelSpec

PHI = 0.6


def ar1(n: int, seed: int, phi: float = PHI, mean: float = 40.0, sd: float = 1.0) -> np.ndarray:
    """An AR(1) feed around ``mean`` with shock sd ``sd``, started at its mean.

    Unlike :func:`~leadline.detector.simulate.simulate_arima` there is no
    burn-in: the engine tests' planted faults and wrap positions were chosen
    on exactly these series.
    """
    rng = np.random.default_rng(seed)
    e = sd * rng.standard_normal(n)
    x = np.zeros(n)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return mean + x


def settings(**changes) -> FeedSettings:
    """AR(1) on a 300-reading training window, no scheduled refits, unless changed.

    The budget stays at one false alarm per week (the default before it
    became 0.2): the planted faults of the engine tests were sized for it.
    """
    base = dict(spec=ModelSpec.ar(1), train_points=300, min_train_points=100, refit_every_s=None,
                false_alarms_per_week=1.0)
    base.update(changes)
    return FeedSettings(**base)
