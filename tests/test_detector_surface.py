"""The core package: a deliberate public surface, importable without any I/O library.

Guarding ``__all__`` with an exact list is common practice: a name added to
or dropped from the public surface shows up as a failing test, not as a
surprise for a caller.
"""

from __future__ import annotations

import inspect
import json
import subprocess
import sys

import leadline.detector as detector
from leadline.detector import errors
from leadline.detector import rules

EXPECTED = sorted([
    # models, streaming, engine, inputs and outputs
    "AlarmEvent", "CAUTION", "Engine", "FeedSettings", "FittedModel", "Innovation", "ModelSpec", "Reading",
    "Stream", "StreamBank", "fit",
    # the rules' public names
    "AlarmLifecycle", "AlarmLimits", "Assessment", "CusumRule", "CusumSignal", "EwmaChart", "EwmaRule", "FeedMonitor",
    "LimitKey", "Rule", "RuleEntry", "StepResult",
    "FlatlineRule", "LifecycleConfig", "MonitorConfig", "NoiseBurstRule", "RangeRule", "SpikeRule",
    "StaleRule", "TabularCusum", "budget_thresholds", "cusum_arl", "ewma_arl", "per_point_rate",
    "shewhart_arl", "sigma_thresholds", "validate_thresholds",
    # the exception tree
    "ConfigError", "DataError", "FitError", "LeadlineError", "ParameterError", "RejectError", "RuleError",
    "SchemaVersionError", "SourceError", "SpecError", "StateFormatError", "StoreError",
])


def test_all_is_the_documented_list_without_repeats():
    assert sorted(detector.__all__) == EXPECTED
    assert len(set(detector.__all__)) == len(detector.__all__)


def test_every_public_name_resolves_to_its_defining_module():
    from leadline.detector.engine import Engine, FeedSettings
    from leadline.detector.events import CAUTION
    from leadline.detector.fitting import fit

    for name in detector.__all__:
        assert getattr(detector, name) is not None, name
    assert detector.Engine is Engine and detector.FeedSettings is FeedSettings
    assert detector.fit is fit and detector.CAUTION is CAUTION
    for name in rules.__all__:
        assert getattr(detector, name) is getattr(rules, name), name


def test_every_error_class_is_exported():
    defined = {name for name, obj in vars(errors).items()
               if inspect.isclass(obj) and issubclass(obj, errors.LeadlineError)}
    assert defined <= set(detector.__all__)
    assert all(getattr(detector, name) is getattr(errors, name) for name in defined)


def test_importing_the_core_loads_no_io_library():
    # A fresh interpreter, so that modules loaded by other tests do not count.
    code = (
        "import json, sys\n"
        "import leadline.detector as d\n"
        "[getattr(d, n) for n in d.__all__]\n"
        "print(json.dumps(sorted(sys.modules)))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    loaded = json.loads(done.stdout)
    assert "leadline.detector.engine" in loaded  # the check itself saw the core load
    forbidden = [m for m in loaded
                 if m.split(".")[0] in {"paho", "sqlalchemy", "psycopg"} or m.startswith("leadline.adapters")]
    assert forbidden == []


def test_the_package_loads_its_heavy_modules_only_on_use():
    # The store, the sources and the CLI's review commands import events, readings and
    # errors; those must not bring statsmodels, scipy and pandas along (seconds of start-up,
    # and a much larger heap for the garbage collector to walk).
    code = (
        "import json, sys\n"
        "import leadline.detector, leadline.detector.events, leadline.detector.readings\n"
        "print(json.dumps(sorted(sys.modules)))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    loaded = json.loads(done.stdout)
    assert "leadline.detector.events" in loaded
    assert [m for m in loaded if m.split(".")[0] in {"statsmodels", "scipy", "pandas"}] == []


def test_unknown_names_are_attribute_errors_and_dir_lists_the_surface():
    try:
        detector.NoSuchName  # noqa: B018
    except AttributeError as exc:
        assert "NoSuchName" in str(exc)
    else:
        raise AssertionError("an unknown name must raise AttributeError")
    assert set(detector.__all__) <= set(dir(detector))
