"""Per-feed options of the config: ``[feeds.defaults]`` and ``[[feeds.override]]``.

Each option is read from its TOML key into a *resolved* key of plain data
(durations in seconds, dates as :class:`datetime.date`), the keys and
defaults listed in :data:`BUILTIN_DEFAULTS`. :func:`resolve` applies the
defaults and then, in file order, every override whose ``match`` globs match
the feed id; a later override wins, and ``limits`` merge key by key.

Options that only make sense together are checked on the resolved options
(:func:`cross_check`): for the defaults, for the defaults plus each override
at load time, and for the exact set of layers of a feed in
:meth:`leadline.adapters.config.Config.feed_settings`.
"""

from __future__ import annotations

import copy
import dataclasses
import fnmatch
import inspect
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any, Iterable, Mapping

from leadline.detector.errors import SpecError
from leadline.detector.feed_settings import FeedSettings
from leadline.detector.rules.monitor import INNOVATION_RULES, MonitorConfig
from leadline.detector.rules import registry
from leadline.detector.rules.thresholds import budget_thresholds, sigma_thresholds
from leadline.detector.seasonality import SeasonalPeriod, zone_info
from leadline.detector.spec import ModelSpec

from .values import (
    Bad,
    Checker,
    Problems,
    TableReader,
    boolean,
    choice,
    choices_text,
    did_you_mean,
    duration_s,
    integer,
    list_of,
    number,
    text,
    toml_repr,
)

#: Fewest training points accepted (common practice: a model with a handful
#: of parameters and calendar terms needs at least some tens of points).
MIN_TRAIN_POINTS = 50
#: UTC offsets in use range from -12 h to +14 h (IANA tz database).
MAX_UTC_OFFSET_S = 14 * 3600.0


def _default(cls: type, name: str) -> Any:
    """The default of dataclass field ``name`` of ``cls``: the engine's defaults are written there only."""
    for f in dataclasses.fields(cls):
        if f.name == name:
            if f.default is dataclasses.MISSING:
                raise TypeError(f"{cls.__name__}.{name} has no plain default")
            return f.default
    raise TypeError(f"{cls.__name__} has no field {name!r}")


#: Resolved option -> its built-in default. Options the engine has a setting
#: for take the default of that setting (:class:`~leadline.detector.feed_settings.FeedSettings`,
#: or its ``monitor``, :class:`~leadline.detector.rules.monitor.MonitorConfig`).
BUILTIN_DEFAULTS: dict[str, Any] = {
    "model": _default(FeedSettings, "spec"),
    "seasonality": [],
    "weekend": False,
    "holidays": [],
    "utc_offset_s": 0.0,
    "timezone": _default(FeedSettings, "timezone"),
    "interval_s": _default(FeedSettings, "interval_s"),
    "train_points": _default(FeedSettings, "train_points"),
    "train_span_s": _default(FeedSettings, "train_span_s"),
    "threshold_mode": _default(FeedSettings, "threshold_mode"),
    "false_alarms_per_week": _default(FeedSettings, "false_alarms_per_week"),
    "limits": {},
    "rules": _default(MonitorConfig, "rules"),
    "range_low": _default(MonitorConfig, "range_low"),
    "range_high": _default(MonitorConfig, "range_high"),
    "counter": _default(FeedSettings, "counter"),
    "register_size": _default(FeedSettings, "register_size"),
    "stale_intervals": _default(MonitorConfig, "stale_intervals"),
    # what a person reads about the feed (listings, the report, the alarm payload); no effect on detection
    "description": None,
    "unit": None,
    "site": None,
    "tag": None,
    "incident_gap_slots": _default(FeedSettings, "incident_gap_slots"),
}

#: The feed's descriptive options (``timezone`` is also one, and steers the cycle search).
METADATA_KEYS = ("description", "unit", "site", "tag", "timezone")

#: TOML key -> resolved key (where they differ, the unit is added).
RESOLVED_NAME = {"interval": "interval_s", "train_span": "train_span_s", "utc_offset": "utc_offset_s"}
TOML_NAME = {v: k for k, v in RESOLVED_NAME.items()}

#: Keys of the ``limits`` table: the arguments of the sigma-mode thresholds.
SIGMA_LIMIT_KEYS = tuple(inspect.signature(sigma_thresholds).parameters)
#: Those that budget mode uses too (the rest are computed from the budget there).
BUDGET_LIMIT_KEYS = tuple(k for k in SIGMA_LIMIT_KEYS if k in inspect.signature(budget_thresholds).parameters)


def _positive() -> Checker:
    return number(0, low_open=True)


def _limit_check(key: registry.LimitKey) -> Checker:
    """The config check of one of the rules' limit keys, from its bounds in the registry."""
    if key.integer:
        return integer(None if key.low is None else int(key.low))
    return number(key.low, key.high, low_open=key.low_open, high_open=key.high_open)


def limit_checks() -> dict[str, Checker]:
    """Key of the ``limits`` table -> its check: the rules' sigma-mode options in the registry."""
    return {key.name: _limit_check(key) for key in registry.limit_keys("sigma")}


LIMIT_CHECKS: dict[str, Checker] = limit_checks()


def _model(value: Any) -> Any:
    if value == "auto":
        return "auto"
    expected = '"auto", or a table such as { order = [1, 0, 1], seasonal = [0, 1, 1, 24], trend = "c" }'
    if not isinstance(value, dict):
        raise Bad(expected, did_you_mean(value, ["auto"]) if isinstance(value, str) else "")
    unknown = sorted(set(value) - {"order", "seasonal", "trend"})
    if unknown:
        raise Bad(expected, f"unknown key {unknown[0]!r}; {did_you_mean(unknown[0], ['order', 'seasonal', 'trend'])}")
    if "order" not in value:
        raise Bad(expected, "the table needs order = [p, d, q]")
    order, seasonal, trend = value["order"], value.get("seasonal"), value.get("trend")
    if not (isinstance(order, list) and len(order) == 3):
        raise Bad(expected, "order must be a list of three integers [p, d, q]")
    if seasonal is not None and not (isinstance(seasonal, list) and len(seasonal) == 4):
        raise Bad(expected, "seasonal must be a list of four integers [P, D, Q, s]")
    try:
        spec = ModelSpec(tuple(order), None if seasonal is None else tuple(seasonal), trend)
    except SpecError as exc:
        raise Bad(expected, str(exc)) from exc
    return {"order": list(spec.order), "seasonal": None if spec.seasonal is None else list(spec.seasonal),
            "trend": trend}


def _season(value: Any) -> dict[str, Any]:
    expected = 'a cycle such as "1d" or "7d:2" (period, and optionally ":" and the number of harmonics)'
    if not isinstance(value, str):
        raise Bad(expected)
    try:
        period = SeasonalPeriod.parse(value)
    except SpecError as exc:
        raise Bad(expected, str(exc)) from exc
    return {"period_s": period.period_s, "harmonics": period.harmonics}


def _holiday(value: Any) -> date:
    expected = "a date such as 2026-12-25 (a TOML date, or the same in quotes)"
    if isinstance(value, datetime):
        raise Bad(expected, "give the date without a time of day")
    if isinstance(value, date):
        return value
    if isinstance(value, str):
        try:
            return date.fromisoformat(value.strip())
        except ValueError as exc:
            raise Bad(expected) from exc
    raise Bad(expected)


def _utc_offset_s(value: Any) -> float:
    expected = 'an offset of local time from UTC such as "1h", "-5h", "+5.5h" or "0", or a number of seconds'
    if isinstance(value, bool):
        raise Bad(expected)
    if isinstance(value, (int, float)):
        seconds = float(value)
    elif isinstance(value, str):
        body = value.strip()
        sign = -1.0 if body.startswith("-") else 1.0
        body = body.lstrip("+-").strip()
        if body in ("0", ""):
            seconds = 0.0
        else:
            try:
                seconds = sign * duration_s(body)
            except Bad as exc:
                raise Bad(expected) from exc
    else:
        raise Bad(expected)
    if abs(seconds) > MAX_UTC_OFFSET_S:
        raise Bad(expected, "offsets in use lie between -12h and +14h")
    return seconds


def _timezone(value: Any) -> str:
    expected = 'an IANA time zone such as "Europe/London" or "UTC"'
    if not isinstance(value, str):
        raise Bad(expected)
    try:
        zone_info(value)
    except SpecError as exc:
        raise Bad(expected, "not in the IANA tz database") from exc
    return value


def _interval_s(value: Any) -> float | None:
    if value == "auto":
        return None
    try:
        return duration_s(value)
    except Bad as exc:
        raise Bad(exc.expected + ', or "auto" (the median spacing of the training readings)') from exc


#: TOML key -> checker of its value (``limits`` is a table, read key by key).
FEED_CHECKS: dict[str, Checker] = {
    "model": _model,
    "seasonality": list_of(_season, what="cycles"),
    "weekend": boolean,
    "holidays": list_of(_holiday, what="dates"),
    "utc_offset": _utc_offset_s,
    "timezone": _timezone,
    "interval": _interval_s,
    "train_points": integer(MIN_TRAIN_POINTS),
    "train_span": duration_s,
    "threshold_mode": choice("sigma", "budget"),
    "false_alarms_per_week": _positive(),
    "rules": list_of(choice(*INNOVATION_RULES), nonempty=True, what="rule names"),
    "range_low": number(),
    "range_high": number(),
    "counter": boolean,
    "register_size": _positive(),
    "stale_intervals": number(1),
    "description": text(),
    "unit": text(),
    "site": text(),
    "tag": text(),
    "incident_gap_slots": integer(0),
}
FEED_KEYS = (*FEED_CHECKS, "limits")


def read_options(reader: TableReader) -> dict[str, Any]:
    """The feed options given in one table, resolved (only the keys present)."""
    out: dict[str, Any] = {}
    for key, check in FEED_CHECKS.items():
        if reader.has(key):
            value = reader.get(key, check, default=_BAD)
            if value is not _BAD:
                out[RESOLVED_NAME.get(key, key)] = value
    limits = reader.table("limits", SIGMA_LIMIT_KEYS)
    if limits is not None and limits.ok:
        read = {k: limits.get(k, LIMIT_CHECKS[k], default=_BAD) for k in SIGMA_LIMIT_KEYS if limits.has(k)}
        out["limits"] = {k: v for k, v in read.items() if v is not _BAD}
    return out


_BAD: Any = object()


def merge(base: Mapping[str, Any], layer: Mapping[str, Any]) -> dict[str, Any]:
    """``base`` with ``layer`` applied: a key of ``layer`` wins, ``limits`` merge by key."""
    out = copy.deepcopy(dict(base))
    for key, value in layer.items():
        if key == "limits":
            out["limits"] = {**out.get("limits", {}), **copy.deepcopy(value)}
        else:
            out[key] = copy.deepcopy(value)
    return out


@dataclass(frozen=True)
class FeedOverride:
    """One ``[[feeds.override]]`` table.

    Attributes
    ----------
    path : str
        Its key path, ``feeds.override[n]``.
    match : tuple of str
        Case-sensitive globs on the feed id (``*``, ``?``, ``[...]``).
    options : dict
        The resolved options it sets.
    """

    path: str
    match: tuple[str, ...]
    options: Mapping[str, Any]

    def matches(self, feed_id: str) -> bool:
        return any(fnmatch.fnmatchcase(feed_id, pattern) for pattern in self.match)


def _match(value: Any) -> tuple[str, ...]:
    expected = 'a glob on the feed id such as "marrowby/flow/*", or a list of them'
    items = value if isinstance(value, list) else [value]
    if not items or not all(isinstance(v, str) and v.strip() for v in items):
        raise Bad(expected)
    return tuple(items)


def read_override(reader: TableReader) -> FeedOverride | None:
    match = reader.get("match", _match, required=True)
    options = read_options(reader)
    if match is None:
        return None
    return FeedOverride(reader.path, match, options)


def _where(key: str, layers: Iterable[tuple[str, Mapping[str, Any]]]) -> str:
    """The key path of the last layer that set resolved ``key``."""
    name = TOML_NAME.get(key, key)
    found = ""
    for path, options in layers:
        if key in options:
            found = f"{path}.{name}"
    return found or f"feeds.defaults.{name} (built-in default)"


def _limit_where(key: str, layers: Iterable[tuple[str, Mapping[str, Any]]]) -> str:
    found = ""
    for path, options in layers:
        if key in options.get("limits", {}):
            found = f"{path}.limits.{key}"
    return found


def usable_limits(resolved: Mapping[str, Any]) -> dict[str, Any]:
    """The ``limits`` that apply in the resolved mode (budget mode uses only :data:`BUDGET_LIMIT_KEYS`)."""
    limits = dict(resolved["limits"])
    if resolved["threshold_mode"] == "budget":
        limits = {k: v for k, v in limits.items() if k in BUDGET_LIMIT_KEYS}
    return limits


def cross_check(resolved: Mapping[str, Any], layers: list[tuple[str, Mapping[str, Any]]], problems: Problems,
                context: str = "") -> None:
    """Options that only make sense together.

    ``layers`` are the (path, options) tables that built ``resolved``, in
    order; a problem names the key path of the table that set the key.
    ``context`` (such as ``for feed "x"``) is added to each message.
    """
    suffix = f" ({context})" if context else ""
    low, high = resolved["range_low"], resolved["range_high"]
    if low is not None and high is not None and not low < high:
        problems.error(_where("range_high", layers),
                       f"range_high ({high:g}) must be above range_low ({low:g}, {_where('range_low', layers)})"
                       + suffix)
    if resolved["register_size"] is not None and not resolved["counter"]:
        problems.error(_where("register_size", layers),
                       "applies only to counter feeds; set counter = true or remove it" + suffix)
    mode = resolved["threshold_mode"]
    # a key inherited from before the layer that chose the mode is simply not used; a key set at or
    # after it was meant for this mode and is a mistake
    mode_layer = max((i for i, (_, options) in enumerate(layers) if "threshold_mode" in options), default=-1)
    for path, options in layers[max(mode_layer, 0):]:
        if mode == "sigma" and "false_alarms_per_week" in options:
            problems.error(f"{path}.false_alarms_per_week",
                           f'applies only with threshold_mode = "budget", but the mode here is "sigma" '
                           f"({_where('threshold_mode', layers)}){suffix}")
        if mode == "budget":
            for key in options.get("limits", {}):
                if key not in BUDGET_LIMIT_KEYS:
                    problems.error(f"{path}.limits.{key}",
                                   f'applies only with threshold_mode = "sigma" (the budget sets it), but the '
                                   f"mode here is \"budget\" ({_where('threshold_mode', layers)}); in budget mode "
                                   f"limits may hold {choices_text(BUDGET_LIMIT_KEYS)}{suffix}")
    limits = usable_limits(resolved)
    warning = limits.get("warning_abs_z", 4.0)
    if "alarm_abs_z" in limits and limits["alarm_abs_z"] < warning:
        problems.error(_limit_where("alarm_abs_z", layers),
                       f"alarm_abs_z ({limits['alarm_abs_z']:g}) must be >= warning_abs_z ({warning:g}){suffix}")
    if "alarm_abs_z" not in limits and warning > 5.0 and mode == "sigma":
        problems.error(_limit_where("warning_abs_z", layers),
                       f"warning_abs_z ({warning:g}) is above the default alarm_abs_z 5; set alarm_abs_z too"
                       + suffix)
    if "clear_abs_z" in limits and limits["clear_abs_z"] > warning:
        problems.error(_limit_where("clear_abs_z", layers),
                       f"clear_abs_z ({limits['clear_abs_z']:g}) must be <= warning_abs_z ({warning:g}): "
                       f"an alarm clears below its limit{suffix}")
    rules = resolved["rules"]
    if rules is not None and "ewma" in rules and "ewma_lam" not in limits:
        problems.error(_where("rules", layers),
                       f'includes "ewma", which needs limits.ewma_lam (for example 0.2){suffix}')
    if resolved["timezone"] is not None and resolved["utc_offset_s"]:
        problems.error(_where("timezone", layers),
                       f"timezone and utc_offset do not go together; give the time zone{suffix}")
    if resolved["seasonality"] and resolved["model"] != "auto" and resolved["model"].get("seasonal"):
        problems.error(_where("seasonality", layers),
                       "calendar cycles and a seasonal ARIMA part (model.seasonal) do not go together; "
                       f"use one of them{suffix}")


def show(resolved: Mapping[str, Any]) -> str:
    """One line per option, TOML-like, for ``check-config --feed``."""
    lines = []
    for key in BUILTIN_DEFAULTS:
        value = resolved[key]
        lines.append(f"{key} = {toml_repr(value, limit=200) if value is not None else '(none)'}")
    return "\n".join(lines)
