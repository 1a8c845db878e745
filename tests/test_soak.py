"""``leadline run`` under random SIGKILLs and broker restarts gives the clean run's events (CI form).

The runner (:mod:`soak.run`, on demand as ``python -m tests.soak.run``) runs
the real service on four AR(1) feeds with planted spikes and a level shift,
once undisturbed and once while it is killed at least ten times (two while
the feeds learn, some as a flush writes, some just after a refit request) and the broker restarts
three times (one a 10 s outage). Every episode of the clean run must come out
with the same end and peak, none extra, none stuck active; every reading must
be journaled exactly once and the CSV offset must end at the file's end.
"""

from __future__ import annotations

import pytest

from mqtt_broker import mosquitto_binary

pytestmark = [pytest.mark.slow, pytest.mark.broker]


def test_kills_and_broker_restarts_change_no_event(tmp_path):
    if mosquitto_binary() is None:
        pytest.skip("no mosquitto binary on this machine (apt-get install mosquitto)")
    from soak.run import soak

    result = soak(tmp_path, steps=3000, kills=10, broker_restarts=3, long_outage_s=10.0, seed=7)
    report = "\n".join(result.lines())
    assert result.kills == 10 and result.broker_restarts == 3, report
    assert result.kills_learning >= 1 and result.kills_in_flush >= 1, report
    assert result.clean_events > 10, report  # the planted faults gave episodes to compare
    assert (result.lost, result.extra, result.changed, result.stuck_active) == ([], [], [], []), report
    assert result.exactly_once and set(result.journal_counts.values()) == {3000}, report
    assert result.offsets_ok, report
