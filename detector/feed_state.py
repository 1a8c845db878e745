"""A feed's whole state as bytes: the checkpoint format, and the rules' state inside it.

A checkpoint holds everything the engine needs to continue a watched feed
after a restart exactly where it stopped: the stream (its own
:meth:`~leadline.detector.stream.Stream.to_bytes`), the grid cursor, the
counter state, the model's facts and schedule, the alarm limits, the
refit window, and the running state of every alarm rule (CUSUM sums, the
noise-burst window, open episodes, the re-anchoring history).

Layout, like the stream's: 8-byte magic ``LLFEED01``, uint16 format version,
uint32 header length, a UTF-8 JSON header, then an ``.npz`` archive of the
arrays, loaded with ``allow_pickle=False``. Nothing is unpickled: loading
a checkpoint cannot run code.

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
"""

from __future__ import annotations

import io
import json
import struct
import zipfile
from collections import deque
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .errors import StateFormatError
from .events import AlarmEvent
from .innovation import Innovation
from .rules.contract import event_from_json, event_to_json, innovation_to_json
from .rules.cusum import CusumSignal
from .rules.level_shift import LevelShiftEstimate
from .rules.lifecycle import Assessment, LifecycleConfig

_MAGIC = b"LLFEED01"
#: Version of the byte format written by :func:`pack`.
FEED_STATE_FORMAT_VERSION = 1

#: Lists of numeric rows at least this long go to the array archive.
TABLE_MIN_ROWS = 16


# --------------------------------------------------------------- byte format
def pack(header: dict[str, Any], arrays: dict[str, np.ndarray]) -> bytes:
    """Header (JSON-serialisable) and arrays to checkpoint bytes."""
    header_bytes = json.dumps(header, sort_keys=True).encode("utf-8")
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return _MAGIC + struct.pack("<HI", FEED_STATE_FORMAT_VERSION, len(header_bytes)) + header_bytes + buffer.getvalue()


def unpack(data: bytes) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Checkpoint bytes to (header, arrays).

    Raises
    ------
    StateFormatError
        Not a leadline feed checkpoint, a format version this build does not
        read, or corrupt bytes.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise StateFormatError(f"feed checkpoint must be bytes, got {type(data).__name__}")
    data = bytes(data)
    if len(data) < len(_MAGIC) + 6 or not data.startswith(_MAGIC):
        raise StateFormatError("not a leadline feed checkpoint (bad magic bytes)")
    version, header_len = struct.unpack_from("<HI", data, len(_MAGIC))
    if version != FEED_STATE_FORMAT_VERSION:
        raise StateFormatError(f"feed checkpoint format version {version} is not supported "
                               f"(this build reads {FEED_STATE_FORMAT_VERSION})")
    start = len(_MAGIC) + 6
    try:
        header = json.loads(data[start:start + header_len].decode("utf-8"))
        with np.load(io.BytesIO(data[start + header_len:]), allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in archive.files}
    except (ValueError, KeyError, UnicodeDecodeError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise StateFormatError(f"feed checkpoint is corrupt: {exc}") from exc
    if not isinstance(header, dict):
        raise StateFormatError("feed checkpoint is corrupt: the header is not a JSON object")
    return header, arrays


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
    """``value`` with every long list of equal-width numeric rows moved to ``arrays``."""
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
    return _tables_out(monitor.state_dict(), arrays, prefix), arrays


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
