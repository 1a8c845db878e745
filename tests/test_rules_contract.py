"""The rules' written contract: one registry entry adds a rule; rule states are explicit and versioned.

References: the saved CUSUM sums are checked against the tabular CUSUM
recursion S+_t = max(0, S+_{t-1} + z_t - k), S-_t = max(0, S-_{t-1} - z_t - k)
worked by hand (Montgomery, Introduction to Statistical Quality Control,
7th ed., 2013, section 9.1); the example rule's budget uses P(z > 0) = 1/2
for a symmetric z, so a run of n positive innovations has probability 2^-n
(exact for independent steps).
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone
from typing import Any

import numpy as np
import pytest

from leadline.adapters.config import feeds as config_feeds
from leadline.detector.errors import RuleError, StateFormatError
from leadline.detector.feed_state import restore_monitor, snapshot_monitor
from leadline.detector.fitting import fit
from leadline.detector.rules import (
    AlarmLimits,
    FeedMonitor,
    LifecycleConfig,
    LimitKey,
    MonitorConfig,
    Rule,
    RuleEntry,
    TabularCusum,
    budget_thresholds,
    registry,
    sigma_thresholds,
)
from leadline.detector.rules.contract import RuleBase
from leadline.detector.rules.lifecycle import Assessment
from leadline.detector.rules.thresholds import default_shares
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec

T0 = datetime(2024, 9, 2, tzinfo=timezone.utc)


def at(i: int) -> datetime:
    return T0 + timedelta(minutes=i)


# ------------------------------------------------------------ an example rule
class PositiveRunRule(RuleBase):
    """Alarm when ``run_steps`` innovations in a row are positive (an example rule, for the contract)."""

    name = "positive_run"

    def __init__(self, run_steps: int) -> None:
        self.run_steps = run_steps
        self._count = 0

    def parameters(self) -> dict[str, Any]:
        return {"run_steps": self.run_steps}

    def reset(self) -> None:
        self._count = 0

    def level_moved(self) -> None:
        self._count = 0

    def assess(self, innovation) -> Assessment | None:
        if not math.isfinite(innovation.z):
            return None
        self._count = self._count + 1 if innovation.z > 0 else 0
        if self._count >= self.run_steps:
            return Assessment("alarm", False, abs(innovation.z), f"{self._count} positive innovations in a row")
        return Assessment(None, self._count == 0, abs(innovation.z))

    def status(self) -> dict[str, Any]:
        return {"count": self._count}

    def state_dict(self) -> dict[str, Any]:
        return {"v": self.STATE_VERSION, "count": self._count}

    def load_state(self, state) -> None:
        self._count = int(self._check_state(state)["count"])


def _budget_run_steps(ctx, options) -> dict[str, Any]:
    # P(run of n positives) = 2^-n: the shortest run whose probability is within the rule's share
    rate = ctx.rate * ctx.shares["positive_run"]
    return {"run_steps": int(math.ceil(-math.log2(rate)))}


POSITIVE_RUN = RuleEntry(
    name="positive_run", kind="innovation",
    build=lambda section, ctx: PositiveRunRule(int(section["run_steps"])),
    lifecycle=LifecycleConfig(1, 1, 2),
    budget_share=0.05,
    limit_keys=(LimitKey("positive_run_steps", 12, low=2, integer=True, modes=("sigma",)),),
    required=("run_steps",),
    sigma_limits=lambda options: {"run_steps": options["positive_run_steps"]},
    budget_limits=_budget_run_steps,
)


@pytest.fixture
def with_example_rule(monkeypatch):
    monkeypatch.setattr(registry, "RULES", registry.RULES + (POSITIVE_RUN,))


@pytest.fixture(scope="module")
def model():
    y = simulate_arima(700, ar=[0.5], mean=10.0, seed=21)
    return fit(y[:500], ModelSpec.ar(1)), y[500:]


def test_one_registry_entry_adds_a_rule_everywhere(with_example_rule, model):
    fitted, clean = model
    # the limits, in both modes, and their stored form's checks
    th = sigma_thresholds(positive_run_steps=9)
    assert th["positive_run"] == {"run_steps": 9}
    assert sigma_thresholds()["positive_run"] == {"run_steps": 12}  # the entry's default
    with pytest.raises(RuleError, match="'positive_run.run_steps'"):
        AlarmLimits.from_json({**th.to_json(), "positive_run": {"run_steps": None}})
    budget = budget_thresholds(fitted.standardized_residuals, interval_s=60.0,
                               shares={"spike": 0.4, "cusum": 0.3, "noise_burst": 0.1, "flatline": 0.1,
                                       "positive_run": 0.1})
    rate = budget.budget["per_point_rate"] * 0.1
    assert 2.0 ** -budget["positive_run"]["run_steps"] <= rate < 2.0 ** -(budget["positive_run"]["run_steps"] - 1)
    assert default_shares()["positive_run"] == 0.05  # the default shares now sum to 1.05: refused
    with pytest.raises(RuleError, match="sum to at most 1"):
        budget_thresholds(fitted.standardized_residuals, interval_s=60.0)
    # the config's limits table checks the new key with the entry's bounds
    checks = config_feeds.limit_checks()
    assert checks["positive_run_steps"](5) == 5
    with pytest.raises(config_feeds.Bad):
        checks["positive_run_steps"](1)
    # the rule names the review commands know, and the monitor's rules and lifecycles
    assert "positive_run" in registry.event_rule_names() and registry.event_rule_names()[-1] == "meter_reset"
    monitor = FeedMonitor("f", fitted.stream(), MonitorConfig(thresholds=sigma_thresholds(positive_run_steps=5)))
    assert isinstance(monitor.rules["positive_run"], Rule)
    assert monitor.lifecycles["positive_run"].config == LifecycleConfig(1, 1, 2)
    values = clean[:60].copy()
    values[20:40] += 2.0 * math.sqrt(fitted.sigma2)  # a lift: a run of positive innovations
    events = [ev for i, v in enumerate(values) for ev in monitor.process(float(v), at(i))]
    assert "positive_run" in {ev.rule for ev in events}
    assert monitor.status()["rules"]["positive_run"]["state"] in ("normal", "pending", "active", "clearing")


def test_the_builtin_rules_follow_the_contract():
    monitor = FeedMonitor("f", None, MonitorConfig(thresholds=sigma_thresholds(ewma_lam=0.2), interval_s=60.0,
                                                   range_low=0.0))
    assert list(monitor.rules) == ["spike", "cusum", "ewma", "noise_burst", "flatline", "range", "stale"]
    # every rule of the registry but the drift rule, which is built only from a model with
    # differencing (tests/test_rules_drift.py builds it through the monitor)
    assert tuple(monitor.rules) == tuple(n for n in registry.rule_names() if n != "drift")
    for name, rule in monitor.rules.items():
        assert isinstance(rule, Rule), name
        assert rule.name == name and registry.entry(name).name == name
    # one place per default: the limits' defaults are the registry's
    defaults = {key.name: key.default for key in registry.limit_keys()}
    assert defaults["cusum_h"] == 5.0 and TabularCusum().h == defaults["cusum_h"]
    assert monitor.rules["cusum"].cusum.h == defaults["cusum_h"]
    assert set(config_feeds.LIMIT_CHECKS) == {key.name for key in registry.limit_keys("sigma")}


# -------------------------------------------------------------- rule states
def _drive(monitor: FeedMonitor, values, start: int, tick: bool = False):
    events, inns = [], []
    for i, v in enumerate(values):
        step = monitor.process(float(v), at(start + i))
        events += step.events
        inns.append((step.innovation.z, step.innovation.forecast, step.innovation.absorbed))
    if tick:
        events += monitor.tick(at(start + len(values) + 30))
    return [(ev.key, ev.end, ev.severity, ev.peak_abs_z, ev.detail) for ev in events], inns


def _faulty(clean: np.ndarray, sigma: float) -> np.ndarray:
    values = clean.copy()
    values[30] += 9 * sigma
    values[60:] += 4 * sigma
    values[45] = np.nan
    values[50] = -100.0  # out of range
    values[120:135] = round(float(values[119]), 2)
    return values


def _config() -> MonitorConfig:
    return MonitorConfig(thresholds=sigma_thresholds(ewma_lam=0.2), interval_s=60.0, range_low=-50.0)


@pytest.mark.parametrize("cut", [31, 62, 125])
def test_every_rule_state_round_trips_and_the_run_continues_exactly(model, cut):
    fitted, clean = model
    values = _faulty(clean[:200], math.sqrt(fitted.sigma2))
    whole = FeedMonitor("f", fitted.stream(), _config())
    expected = _drive(whole, values, 0, tick=True)

    first = FeedMonitor("f", fitted.stream(), _config())
    head = _drive(first, values[:cut], 0)
    # the state of every rule is plain, strict JSON with its version
    for name, rule in first.rules.items():
        state = rule.state_dict()
        assert state["v"] == 1
        assert json.loads(json.dumps(state, allow_nan=False)) == state, name
    saved, arrays = snapshot_monitor(first)
    saved = json.loads(json.dumps(saved))
    # a fresh monitor of the same configuration, on the stream where the first one stopped
    second = FeedMonitor("f", first.stream, _config())
    restore_monitor(second, saved, arrays)
    assert json.dumps(second.state_dict(), sort_keys=True) == json.dumps(first.state_dict(), sort_keys=True)
    tail = _drive(second, values[cut:], cut, tick=True)
    assert head[1] + tail[1] == expected[1]
    assert head[0] + tail[0] == expected[0]
    assert {ev[0][1] for ev in expected[0]} >= {"spike", "cusum", "range", "flatline", "stale"}


def test_the_saved_form_does_not_depend_on_attribute_names():
    chart = TabularCusum(0.5, 4.0)
    for z in (1.0, 2.0, -0.5):
        chart.update(z)
    # S+ = 0.5, 2.0, 1.0 and S- = 0, 0, 0 by the recursion (hand computation); S- is still at
    # zero at the third step, so a downward run would start there
    assert chart.state_dict() == {"v": 1, "calls": 3, "s_hi": 1.0, "s_lo": 0.0, "n_hi": 3, "n_lo": 0,
                                  "start_hi": 1, "start_lo": 3, "held": None, "held_call": 0}
    monitor = FeedMonitor("f", None, _config())
    monitor.rules["cusum"].cusum.update(1.0)
    before = json.dumps(snapshot_monitor(monitor)[0], sort_keys=True)
    # fields the objects hold besides their state do not reach the checkpoint
    monitor._scratch = [1, 2, 3]
    for rule in monitor.rules.values():
        rule._scratch = "not state"
    for life in monitor.lifecycles.values():
        life._scratch = 0.5
    assert json.dumps(snapshot_monitor(monitor)[0], sort_keys=True) == before
    for state in (monitor.state_dict(), *(rule.state_dict() for rule in monitor.rules.values())):
        assert not [key for key in state if key.startswith("_")]


def test_an_unknown_state_version_is_refused_naming_the_rule(model):
    fitted, _ = model
    monitor = FeedMonitor("plant/f", fitted.stream(), _config())
    for name, rule in monitor.rules.items():
        with pytest.raises(StateFormatError, match=f"rule '{name}'.*version 99 is not supported"):
            rule.load_state({**rule.state_dict(), "v": 99})
    life = monitor.lifecycles["spike"]
    with pytest.raises(StateFormatError, match="lifecycle of rule 'spike'.*version 2"):
        life.load_state({**life.state_dict(), "v": 2})
    with pytest.raises(StateFormatError, match="monitor of feed 'plant/f'.*version None"):
        monitor.load_state({"readings": 3})
    other = FeedMonitor("plant/f", fitted.stream(), MonitorConfig(rules=("spike",)))
    with pytest.raises(StateFormatError, match="holds rules"):
        other.load_state(monitor.state_dict())
