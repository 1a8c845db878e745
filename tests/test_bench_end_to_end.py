"""The end-to-end benchmark still runs: a few feeds through every phase in well under a minute.

``tests/benchmarks/bench_end_to_end.py`` is run on demand; this smoke test keeps it from
rotting. It runs one small case (the real ``leadline run``, a private Mosquitto, an SQLite
store, two publisher processes and the bare client) and checks that every figure came out
finite and positive and that each planted spike was committed as a ``spike`` event of its
own reading. The planted reading is 20 standard deviations of the white-noise feed above
its mean, four times the default sigma-mode alarm limit of |z| >= 5, so a miss is a
failure of the pipeline, not of the statistics.
"""

from __future__ import annotations

import math

import pytest

from mqtt_broker import mosquitto_binary

pytestmark = [pytest.mark.slow, pytest.mark.broker]


def test_a_small_case_gives_finite_figures_and_finds_every_planted_spike(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    from benchmarks.bench_end_to_end import PARTS, Plan, run_case, table

    plan = Plan(window_s=4.0, summary_interval_s=2.0, warmup_s=1.0, publisher_alone_s=2.0, spikes=3,
                spike_gap_s=0.3, publishers=2)
    result = run_case(12, "sqlite", plan, tmp_path / "case")
    rates = {name: getattr(result, name) for name in ("service_rate", "bare_rate", "publisher_rate",
                                                     "publisher_alone_rate", "bare_alone_rate", "learning_rate")}
    assert all(math.isfinite(v) and v > 0 for v in rates.values()), rates
    assert 0 < result.ratio < 10
    assert result.spikes_planted == 3
    assert len(result.latencies_s) == 3, "a planted spike was not committed as its own spike event"
    assert all(0 < x < 30 for x in result.latencies_s), result.latencies_s
    assert result.flushes >= 1 and result.store_seconds["journal"] > 0
    assert sum(result.share(p) for p in PARTS) == pytest.approx(100.0)
    assert result.limited_by in {"publisher", "service", "broker"} and result.reason
    assert len(table([result])) == 3
