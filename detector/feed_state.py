"""A feed's whole state as bytes: the checkpoint format, and the rules' state inside it.

A checkpoint holds everything the engine needs to continue a watched feed
after a restart exactly where it stopped: the stream (its own
:meth:`~leadline.detector.stream.Stream.to_bytes`), the grid cursor, the
counter state, the model's facts and schedule, the alarm limits, the
refit window, and the running state of every alarm rule (CUSUM sums, the
noise-burst window, open episodes, the re-anchoring history).

:func:`feed_checkpoint` saves a watched feed whole (section "The feed" below);
:func:`feed_from_checkpoint` rebuilds it. After a restore the feed scores the
next slot exactly as it would have without the restart. A refit that was in
flight is requested again at the next slot. When the rule settings changed
in between, the rules restart, and the episodes that were open are closed,
with a note in their detail. A feed that is still learning has no
checkpoint; after a restart it learns again.

The bytes are a header and arrays in the container of
:mod:`.checkpoint_bytes` (:func:`pack`, :func:`unpack`; nothing is unpickled,
so loading a checkpoint cannot run code). Format 2 also keeps the refit window as float32 departures from
``history_reference`` (:mod:`.ring`) and the rules' configuration as its
SHA-256 (``monitor_fingerprint_sha256``) rather than its text; format 1
checkpoints are still read.

The rules' state
----------------
:func:`snapshot_monitor` asks the monitor for its state
(:meth:`~leadline.detector.rules.FeedMonitor.state_dict`: each rule and
lifecycle writes its own fields explicitly, as plain JSON values, with a
layout version ``"v"``); nothing is read from the objects' attributes, so
renaming a private field does not change a checkpoint. Long tables of
numbers (the re-anchoring history) go to the array archive, not the JSON.
:func:`restore_monitor` hands the state back
(:meth:`~leadline.detector.rules.FeedMonitor.load_state`) to a monitor
freshly built with the same configuration. The engine only restores into a
monitor whose configuration fingerprint matches the saved one; any
mismatch of structure, or a version this build does not read, is a
:class:`~leadline.detector.errors.StateFormatError`.

Checkpoints written before the rules' state had its own layout hold the
monitor as its attributes (``{"$object": "FeedMonitor", "attrs": ...}``);
they are read too (:func:`_legacy_state`).

The feed's incident grouping (:meth:`~leadline.detector.incidents.IncidentGrouper.state_dict`,
its own version ``"v"``) is saved under ``"incidents"``; a checkpoint
without it restores with no incident open, so the next event starts one.
"""

from __future__ import annotations

import hashlib
import json
from collections import deque
from collections.abc import Callable
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .counters import CounterDeltas
from .engine_output import EngineOutput, StateChange
from .errors import ConfigError, DataError, StateFormatError
from .events import AlarmEvent
from .grid import GridCounts, GridCursor
from .innovation import Innovation
from .checkpoint_bytes import FEED_STATE_FORMAT_VERSION, READABLE_FORMAT_VERSIONS, pack, unpack  # noqa: F401
from .ring import RingBuffer
from .rules.monitor import FeedMonitor, MonitorConfig
from .rules.limits import AlarmLimits
from .rules.thresholds import sigma_thresholds
from .seasonality import CalendarTerms
from .spec import ModelSpec
from .stream import Stream
from .rules.contract import event_from_json, event_to_json, innovation_to_json
from .rules.cusum import CusumSignal
from .rules.level_shift import LevelShiftEstimate
from .rules.lifecycle import Assessment, LifecycleConfig

#: Lists of numeric rows at least this long go to the array archive.
TABLE_MIN_ROWS = 16


def encode_time(when: datetime | None) -> str | None:
    return None if when is None else when.isoformat()


def decode_time(text: str | None) -> datetime | None:
    if text is None:
        return None
    when = datetime.fromisoformat(text)
    if when.tzinfo is None:
        raise StateFormatError(f"saved time {text!r} has no timezone")
    return when.astimezone(timezone.utc)


# ------------------------------------------------------------ the monitor
def _is_row(row: Any) -> bool:
    return isinstance(row, list) and bool(row) and all(
        isinstance(x, (bool, int, float)) for x in row)


def _tables_out(value: Any, arrays: dict[str, np.ndarray], prefix: str) -> Any:
    """``value`` with every array, and every long list of equal-width numeric rows, moved to ``arrays``."""
    if isinstance(value, np.ndarray):
        name = f"{prefix}{len(arrays)}"
        arrays[name] = np.asarray(value, dtype=float)
        return {"$array": name}
    if isinstance(value, dict):
        return {k: _tables_out(v, arrays, prefix) for k, v in value.items()}
    if isinstance(value, list):
        if len(value) >= TABLE_MIN_ROWS and all(_is_row(row) for row in value):
            types = ["b" if isinstance(x, bool) else "i" if isinstance(x, int) else "f" for x in value[0]]
            if all(len(row) == len(types) and ["b" if isinstance(x, bool) else "i" if isinstance(x, int) else "f"
                                               for x in row] == types for row in value):
                name = f"{prefix}{len(arrays)}"
                arrays[name] = np.array(value, dtype=float).reshape(len(value), len(types))
                return {"$table": name, "types": "".join(types)}
        return [_tables_out(v, arrays, prefix) for v in value]
    return value


def _tables_in(value: Any, arrays: dict[str, np.ndarray]) -> Any:
    if isinstance(value, dict):
        if "$array" in value:
            try:
                return arrays[value["$array"]]
            except KeyError as exc:
                raise StateFormatError(f"feed checkpoint is missing array {value['$array']!r}") from exc
        if "$table" in value:
            try:
                array = arrays[value["$table"]]
            except KeyError as exc:
                raise StateFormatError(f"feed checkpoint is missing array {value['$table']!r}") from exc
            casts = {"b": bool, "i": int, "f": float}
            kinds = [casts[t] for t in value["types"]]
            return [[cast(x) for cast, x in zip(kinds, row)] for row in array.tolist()]
        return {k: _tables_in(v, arrays) for k, v in value.items()}
    if isinstance(value, list):
        return [_tables_in(v, arrays) for v in value]
    return value


def snapshot_monitor(monitor: Any, prefix: str = "monitor_") -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """The running state of a FeedMonitor and its rules: (JSON-ready dict, arrays)."""
    arrays: dict[str, np.ndarray] = {}
    return _tables_out(monitor.state_dict(compact=True), arrays, prefix), arrays


def _monitor_state(saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> dict[str, Any]:
    if not isinstance(saved, dict):
        raise StateFormatError("feed checkpoint is corrupt: the rules' state is not a JSON object")
    if "$object" in saved:
        return _legacy_state(saved, arrays)
    return _tables_in(saved, arrays)


def restore_monitor(monitor: Any, saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> None:
    """Write a :func:`snapshot_monitor` back into a monitor built with the same configuration."""
    monitor.load_state(_monitor_state(saved, arrays))


def saved_open_events(saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> list[AlarmEvent]:
    """The episodes that were open in a saved monitor (to close them when it cannot be restored)."""
    state = _monitor_state(saved, arrays)
    out = []
    for life in state.get("lifecycles", {}).values():
        event = event_from_json(life.get("open_episode"))
        if event is not None:
            out.append(event)
    return out


# --------------------------------------------- checkpoints of the first layout
#: Frozen value types that may appear in a first-layout monitor state, by name.
VALUE_TYPES = {cls.__name__: cls for cls in (AlarmEvent, Innovation, CusumSignal, Assessment, LifecycleConfig,
                                             LevelShiftEstimate)}


class _LegacyObject(dict):
    """The decoded attributes of a saved rule object, by their attribute names."""


class _Decoder:
    """Values of the first layout: tagged JSON and tables of numeric tuples."""

    def __init__(self, arrays: dict[str, np.ndarray]) -> None:
        self.arrays = arrays

    def value(self, v: Any) -> Any:
        if not isinstance(v, dict):
            if isinstance(v, list):
                raise StateFormatError("feed checkpoint is corrupt: an untagged list in the rules' state")
            return v
        if "$time" in v:
            return decode_time(v["$time"])
        for kind in ("list", "tuple", "deque"):
            key = "$" + kind
            if key in v:
                items = self._items(v[key])
                if kind == "list":
                    return items
                if kind == "tuple":
                    return tuple(items)
                return deque(items, maxlen=v.get("maxlen"))
        if "$dict" in v:
            return {k: self.value(x) for k, x in v["$dict"].items()}
        if "$value" in v:
            cls = VALUE_TYPES.get(v["$value"])
            if cls is None:
                raise StateFormatError(f"feed checkpoint names an unknown value type {v['$value']!r}")
            return cls(**{k: self.value(x) for k, x in v["fields"].items()})
        if "$object" in v:
            return _LegacyObject({k: self.value(x) for k, x in v["attrs"].items()})
        raise StateFormatError(f"feed checkpoint is corrupt: unknown tag in {sorted(v)[:3]}")

    def _items(self, data: Any) -> list[Any]:
        if isinstance(data, dict) and "$table" in data:
            try:
                array = self.arrays[data["$table"]]
            except KeyError as exc:
                raise StateFormatError(f"feed checkpoint is missing array {data['$table']!r}") from exc
            casts = {"b": bool, "i": int, "f": float}
            kinds = [casts[t] for t in data["types"]]
            return [tuple(cast(x) for cast, x in zip(kinds, row)) for row in array.tolist()]
        return [self.value(x) for x in data]


def _legacy_rule(name: str, attrs: dict[str, Any]) -> dict[str, Any]:
    """One rule's first-layout attributes as its state dict (version 1)."""
    if name == "cusum":
        c = attrs["cusum"]
        return {"v": 1, "chart": {"v": 1, "calls": c["_calls"], "s_hi": c["_s_hi"], "s_lo": c["_s_lo"],
                                  "n_hi": c["_n_hi"], "n_lo": c["_n_lo"], "start_hi": c["_start_hi"],
                                  "start_lo": c["_start_lo"], "held": c["_held"],
                                  "held_call": c.get("_held_call", 0)}}
    if name == "ewma":
        return {"v": 1, "chart": {"v": 1, "average": attrs["chart"]["_e"], "steps": attrs["chart"]["_steps"]}}
    if name == "noise_burst":
        return {"v": 1, "window": list(attrs["_values"])}
    if name == "flatline":
        log_p = attrs["_log_p"]
        return {"v": 1, "previous": attrs["_previous"], "run_steps": attrs["_run"],
                "log_run_probability": log_p if np.isfinite(log_p) else None}
    if name == "stale":
        return {"v": 1, "last_seen": encode_time(attrs["last_seen"])}
    return {"v": 1}


# ----------------------------------------------------------------- the feed
def _fingerprint(config: MonitorConfig) -> str:
    """The rules' configuration as text: rule states are restored only into an equal one."""
    return config.fingerprint()


def _fingerprint_digest(config: MonitorConfig) -> str:
    """SHA-256 of :func:`_fingerprint`, what a checkpoint of format 2 keeps (64 bytes, not the text)."""
    return hashlib.sha256(_fingerprint(config).encode("utf-8")).hexdigest()


def _same_rules(config: MonitorConfig, header: dict[str, Any]) -> bool:
    if "monitor_fingerprint_sha256" in header:
        return _fingerprint_digest(config) == header["monitor_fingerprint_sha256"]
    return _fingerprint(config) == header["monitor_fingerprint"]  # format 1 kept the text


def feed_checkpoint(feed: Any) -> bytes:
    """A watched feed's whole state as checkpoint bytes (see the section above).

    Parameters
    ----------
    feed : FeedLifecycle
        A feed of :mod:`.feed` in state ``watching``.

    Raises
    ------
    DataError
        The feed has no model yet.
    """
    if feed.state != "watching":
        raise DataError(f"feed {feed.feed_id!r} is {feed.state} and has no model to checkpoint yet")
    monitor_state, arrays = snapshot_monitor(feed.monitor)
    c = feed.cursor
    in_flight = None
    if feed.pending is not None:
        in_flight = [feed.pending.request.reason, feed.pending.full_selection]
    elif feed.refit_due is not None:
        in_flight = list(feed.refit_due)
    header = {
        "feed_id": feed.feed_id,
        "model_version": feed.model_version,
        "model_label": feed.model_label,
        "model_reason": feed.model_reason,
        "fitted_at": encode_time(feed.fitted_at),
        "fitted_spec": feed.fitted_spec.to_dict(),
        "fitted_calendar": None if feed.fitted_calendar is None else feed.fitted_calendar.to_dict(),
        "fit_problems": feed.fit_problems,
        "next_refit_epoch_s": feed.next_refit_epoch_s,
        "cursor": {"origin_epoch_s": c.origin_epoch_s, "interval_s": c.interval_s, "next_slot": c.next_slot,
                   "counts": c.counts.as_dict()},
        "next_slot": feed.next_slot,
        "counter": None if feed.counter is None else feed.counter.to_dict(),
        "thresholds": feed.thresholds.to_json(),
        "thresholds_config": feed.thresholds_config,
        "monitor_fingerprint_sha256": _fingerprint_digest(feed.monitor.config),
        "monitor": monitor_state,
        "diagnostics": {"since_check": feed.diagnostics.since_check, "last": feed.diagnostics.last},
        "incidents": feed.incidents.state_dict(),
        "last_diag_refit_slot": feed.last_diag_refit_slot,
        "refit_in_flight": in_flight,
        "last_refit_error": feed.last_refit_error,
        "request_seq": feed.request_seq,
        "stats": {"readings": feed.readings, "rejects": feed.rejects, "last_time": encode_time(feed.last_time),
                  "last_value": feed.last_value, "last_seen": encode_time(feed.last_seen),
                  "meter_resets": feed.meter_resets},
    }
    arrays["stream"] = np.frombuffer(feed.monitor.stream.to_bytes(), dtype=np.uint8)
    arrays["history"] = feed.history.stored()  # float32 departures from history_reference
    header["history_reference"] = feed.history.saved_reference
    arrays["diagnostics_z"] = feed.diagnostics.z.stored()  # float32 departures from z_reference
    header["diagnostics"]["z_reference"] = feed.diagnostics.z.saved_reference
    return pack(header, arrays)


def feed_from_checkpoint(new_feed: Callable[[str, Any], Any], feed_id: str, settings: Any, data: bytes,
                         model_version: int) -> tuple[Any, EngineOutput]:
    """Rebuild a watched feed from :func:`feed_checkpoint` bytes.

    Parameters
    ----------
    new_feed : callable
        ``new_feed(feed_id, settings)`` builds a fresh feed
        (:class:`~leadline.detector.feed.FeedLifecycle`), which is then
        filled from the checkpoint.
    feed_id : str
    settings : FeedSettings
        The feed's current settings.
    data : bytes
    model_version : int
        The model version the checkpoint must hold.

    Returns
    -------
    feed, EngineOutput
        The feed, watching, and its state change (plus the closing of
        episodes whose rule settings changed).

    Raises
    ------
    StateFormatError
        Bytes that are not a checkpoint of this feed and version, or a
        grid or counter setting that changed since (the feed must learn again).
    """
    header, arrays = unpack(data)
    try:
        return _feed_from_parts(new_feed, feed_id, settings, header, arrays, model_version)
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, (StateFormatError, ConfigError)):
            raise
        raise StateFormatError(f"feed {feed_id!r}: checkpoint is corrupt: {exc!r}") from exc


def _feed_from_parts(new_feed: Callable[[str, Any], Any], feed_id: str, settings: Any, header: dict[str, Any],
                     arrays: dict[str, np.ndarray], model_version: int) -> tuple[Any, EngineOutput]:
    if header["feed_id"] != feed_id:
        raise StateFormatError(f"checkpoint is of feed {header['feed_id']!r}, not {feed_id!r}")
    stream = Stream.from_bytes(arrays["stream"].tobytes())
    if stream.model_version != model_version or header["model_version"] != model_version:
        raise StateFormatError(f"feed {feed_id!r}: checkpoint holds model version {stream.model_version}, "
                               f"not {model_version}")
    saved_cursor = header["cursor"]
    if settings.interval_s is not None and settings.interval_s != saved_cursor["interval_s"]:
        raise StateFormatError(f"feed {feed_id!r}: interval_s is now {settings.interval_s:g} s, the checkpoint's "
                               f"grid has {saved_cursor['interval_s']:g} s; the feed must learn again")
    if settings.counter != (header["counter"] is not None):
        raise StateFormatError(f"feed {feed_id!r}: counter is now {settings.counter}, the checkpoint was "
                               f"taken with counter {header['counter'] is not None}; the feed must learn again")
    feed = new_feed(feed_id, settings)
    out = EngineOutput()
    cursor = GridCursor(saved_cursor["origin_epoch_s"], saved_cursor["interval_s"], settings.grid_tolerance,
                        saved_cursor["next_slot"])
    cursor.counts = GridCounts(**saved_cursor["counts"])
    feed.cursor = cursor
    feed.next_slot = int(header["next_slot"])
    if header["counter"] is not None:  # the saved baseline, the current register settings
        feed.counter = CounterDeltas.from_dict(header["counter"], register_size=settings.register_size,
                                               reset_drop_fraction=settings.reset_drop_fraction)
    feed.model_version = model_version
    feed.model_label = header["model_label"]
    feed.model_reason = header["model_reason"]
    feed.fitted_at = decode_time(header["fitted_at"])
    feed.fitted_spec = ModelSpec.from_dict(header["fitted_spec"])
    feed.fitted_calendar = (None if header["fitted_calendar"] is None
                            else CalendarTerms.from_dict(header["fitted_calendar"]))
    feed.fit_problems = list(header["fit_problems"])
    feed.next_refit_epoch_s = header["next_refit_epoch_s"]
    if settings.refit_every_s is None:
        feed.next_refit_epoch_s = None
    elif feed.next_refit_epoch_s is None:
        feed.next_refit_epoch_s = feed.fitted_at.timestamp() + settings.refit_every_s
    thresholds = AlarmLimits.from_json(header["thresholds"])
    feed.thresholds_config = header["thresholds_config"]
    current = json.loads(json.dumps(settings.thresholds_config(cursor.interval_s)))  # as saved
    if current != feed.thresholds_config:
        if settings.threshold_mode == "sigma":
            thresholds = sigma_thresholds(**current["sigma_limits"])
            feed.thresholds_config = current
        else:  # budget limits need the fit's residuals: a refit sets them
            feed.refit_due = ("threshold settings changed", False)
    feed.thresholds = thresholds
    stats = header["stats"]
    feed.readings = int(stats["readings"])
    feed.rejects.update(stats["rejects"])
    feed.last_time = decode_time(stats["last_time"])
    feed.last_value = float(stats["last_value"])
    feed.last_seen = decode_time(stats["last_seen"])
    feed.meter_resets = int(stats["meter_resets"])
    config = feed.monitor_config(thresholds)
    monitor = FeedMonitor(feed_id, stream, config, last_seen=feed.last_seen)
    if _same_rules(config, header):
        restore_monitor(monitor, header["monitor"], arrays)
        resumed = "rule states restored"
    else:
        when = feed.last_time or feed.at_last_slot()
        for event in saved_open_events(header["monitor"], arrays):
            out.events.append(event.cleared(max(when, event.start),
                                            detail=f"{event.detail}; closed at restart: the feed's rule "
                                                   "settings changed"))
        resumed = "rule settings changed, rule states restarted"
    feed.monitor = monitor
    if "history_reference" in header:
        feed.history = RingBuffer.from_stored(settings.refit_window_points, arrays["history"],
                                              header["history_reference"], np.float32)
    else:  # format 1 kept the refit window as float64 values
        feed.history = RingBuffer(settings.refit_window_points, arrays["history"], dtype=np.float32)
    saved_diagnostics = header["diagnostics"]
    if "z_reference" in saved_diagnostics:
        z = feed.diagnostics.z
        feed.diagnostics.z = RingBuffer.from_stored(z.capacity, arrays["diagnostics_z"],
                                                    saved_diagnostics["z_reference"], z.dtype)
    else:  # format 1 kept the values
        feed.diagnostics.z.extend(arrays["diagnostics_z"])
    feed.diagnostics.since_check = int(header["diagnostics"]["since_check"])
    feed.diagnostics.last = header["diagnostics"]["last"]
    feed.last_diag_refit_slot = header["last_diag_refit_slot"]
    feed.last_refit_error = header["last_refit_error"]
    feed.request_seq = int(header["request_seq"])
    if header["refit_in_flight"] is not None and feed.refit_due is None:
        reason, full = header["refit_in_flight"]
        again = " (requested again after a restart)"
        feed.refit_due = (reason if reason.endswith(again) else reason + again, bool(full))
    if header.get("incidents") is not None:  # absent from checkpoints taken before incidents were kept
        feed.incidents.load_state(header["incidents"])
    feed.tag_events(out)
    feed.state = "watching"
    out.state_changes.append(StateChange(
        feed_id, "new", "watching", feed.last_time or feed.at_last_slot(),
        f"resumed from checkpoint at slot {feed.next_slot} with model version {model_version} "
        f"({feed.model_label}); no learning phase; {resumed}"))
    return feed, out

def _legacy_state(saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> dict[str, Any]:
    """A first-layout monitor (its attributes) as a :meth:`FeedMonitor.state_dict` (version 1)."""
    if saved.get("$object") != "FeedMonitor":
        raise StateFormatError(f"feed checkpoint: monitor was a {saved.get('$object')}, this build has a FeedMonitor")
    attrs = _Decoder(arrays).value(saved)
    try:
        lifecycles = {name: {"v": 1, "on_delay_window": list(life["_window"]),
                             "open_episode": event_to_json(life["_event"]), "off_delay_count": life["_clear_count"]}
                      for name, life in attrs["lifecycles"].items()}
        rules = {name: _legacy_rule(name, attrs[name]) for name in attrs["lifecycles"]}
        pending_shock, pending = attrs["_pending_shock"], attrs["_pending"]
        return {
            "v": 1, "readings": attrs["readings"], "not_absorbed": attrs["not_absorbed"], "shocks": attrs["shocks"],
            "reanchors": attrs["reanchors"], "last_reanchor": attrs["last_reanchor"], "steps": attrs["_steps"],
            "shock_candidate": None if pending_shock is None else list(pending_shock),
            "last_absorbed": attrs["_last_absorbed"],
            "last_innovation": innovation_to_json(attrs["last_innovation"]),
            "history": [list(row) for row in attrs["_history"]],
            "settle": None if attrs["_settle"] is None else [list(row) for row in attrs["_settle"]],
            "settle_prior_se": attrs["_settle_prior_se"],
            "unconfirmed": None if pending is None else list(pending),
            "rules": rules, "lifecycles": lifecycles,
        }
    except (KeyError, TypeError) as exc:
        raise StateFormatError(f"feed checkpoint: the saved rules' state lacks {exc}") from exc
