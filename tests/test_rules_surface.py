"""The rules package: a deliberate public surface, and pure code (no I/O).

Guarding ``__all__`` with an exact list is common practice: a name added to or
dropped from the public surface shows up as a failing test.
"""

from __future__ import annotations

import ast
import pathlib

import leadline.detector.rules as rules

RULES_DIR = pathlib.Path(rules.__file__).parent
FORBIDDEN = {"paho", "sqlalchemy", "psycopg", "socket", "sqlite3", "leadline.adapters", "subprocess", "requests"}


def test_public_surface_is_the_documented_one():
    assert sorted(rules.__all__) == sorted([
        "AlarmLifecycle", "AlarmLimits", "Assessment", "CusumRule", "CusumSignal", "EwmaChart", "EwmaRule",
        "FeedMonitor", "FlatlineRule", "LifecycleConfig", "LimitKey", "MonitorConfig", "NoiseBurstRule",
        "RangeRule", "Rule", "RuleEntry", "SpikeRule", "StaleRule", "StepResult", "TabularCusum",
        "budget_thresholds", "cusum_arl", "ewma_arl", "per_point_rate", "shewhart_arl", "sigma_thresholds",
        "validate_thresholds",
    ])
    for name in rules.__all__:
        obj = getattr(rules, name)
        assert obj.__doc__ and obj.__doc__.strip(), f"{name} has no docstring"
        assert name in rules.__doc__, f"{name} is not described in the package docstring"


def test_rules_do_no_io():
    for path in sorted(RULES_DIR.glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in ("open", "print", "input"), f"{path.name}:{node.lineno} calls {node.func.id}"
                continue
            else:
                continue
            for name in names:
                assert not any(name == f or name.startswith(f + ".") for f in FORBIDDEN), f"{path.name} imports {name}"
