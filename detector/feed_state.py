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

Layout, like the stream's: 8-byte magic ``LLFEED01``, uint16 format version,
uint32 header length, a UTF-8 JSON header, then an ``.npz`` archive of the
arrays, loaded with ``allow_pickle=False``. Nothing is unpickled: loading
a checkpoint cannot run code.

The rules' state
----------------
:func:`snapshot_monitor` walks a :class:`~leadline.detector.rules.FeedMonitor`
and its rule objects attribute by attribute and writes plain values
(numbers, text, lists, tuples, deques, dicts, UTC datetimes, and the
frozen value types of the rules such as :class:`~leadline.detector.events.AlarmEvent`).
:func:`restore_monitor` writes them back *into* a monitor freshly built with
the same configuration, object by object, so shared references (the
monitor's list of its rules) stay intact. Long sequences of numeric tuples
(the re-anchoring history) go to the array archive, not the JSON.
The engine only restores into a monitor whose configuration fingerprint
matches the saved one; any mismatch of structure is a
:class:`~leadline.detector.errors.StateFormatError`.
"""

from __future__ import annotations

import dataclasses
import io
import json
import struct
import zipfile
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
from .refit import RingBuffer
from .rules.monitor import FeedMonitor, MonitorConfig
from .rules.thresholds import sigma_thresholds
from .seasonality import CalendarTerms
from .spec import ModelSpec
from .stream import Stream
from .rules.cusum import CusumSignal
from .rules.level_shift import LevelShiftEstimate
from .rules.lifecycle import Assessment, LifecycleConfig

_MAGIC = b"LLFEED01"
#: Version of the byte format written by :func:`pack`.
FEED_STATE_FORMAT_VERSION = 1

#: Frozen value types that may appear in a monitor's state, by name.
VALUE_TYPES = {cls.__name__: cls for cls in (AlarmEvent, Innovation, CusumSignal, Assessment, LifecycleConfig,
                                             LevelShiftEstimate)}
#: Attributes of the monitor itself that are not state: rebuilt from the configuration.
MONITOR_SKIP = frozenset({"stream", "config", "_rules", "feed_id"})
#: Sequences of numeric tuples at least this long go to the array archive.
TABLE_MIN_ROWS = 16
_RULES_MODULE = "leadline.detector.rules"


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


# ----------------------------------------------------------- value encoding
class _Encoder:
    """Plain values to JSON-ready form; long numeric tables to arrays."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.arrays: dict[str, np.ndarray] = {}

    def value(self, v: Any) -> Any:
        if v is None or isinstance(v, (bool, str)):
            return v
        if isinstance(v, (int, float)):
            return v
        if isinstance(v, np.generic):
            return v.item()
        if isinstance(v, datetime):
            if v.tzinfo is None:
                raise StateFormatError("cannot save a naive datetime in a feed checkpoint")
            return {"$time": v.isoformat()}
        if isinstance(v, (list, tuple, deque)):
            table = self._table(v)
            kind = "list" if isinstance(v, list) else ("tuple" if isinstance(v, tuple) else "deque")
            out: dict[str, Any] = {"$" + kind: table if table is not None else [self.value(x) for x in v]}
            if isinstance(v, deque):
                out["maxlen"] = v.maxlen
            return out
        if isinstance(v, dict):
            if not all(isinstance(k, str) for k in v):
                raise StateFormatError(f"cannot save a dict with non-text keys: {list(v)[:3]!r}")
            return {"$dict": {k: self.value(x) for k, x in v.items()}}
        if dataclasses.is_dataclass(v) and type(v).__name__ in VALUE_TYPES:
            return {"$value": type(v).__name__,
                    "fields": {f.name: self.value(getattr(v, f.name)) for f in dataclasses.fields(v)}}
        if type(v).__module__.startswith(_RULES_MODULE) and hasattr(v, "__dict__"):
            return {"$object": type(v).__qualname__, "attrs": {k: self.value(x) for k, x in vars(v).items()}}
        raise StateFormatError(f"cannot save a value of type {type(v).__qualname__} in a feed checkpoint")

    def _table(self, seq: Any) -> dict[str, Any] | None:
        """Numeric tuples of one width, stored as a float64 array with column types."""
        if len(seq) < TABLE_MIN_ROWS or not all(isinstance(row, tuple) for row in seq):
            return None
        width = len(seq[0])
        types: list[str] | None = None
        for row in seq:
            if len(row) != width:
                return None
            row_types = ["b" if isinstance(x, bool) else "i" if isinstance(x, int) else
                         "f" if isinstance(x, float) else "?" for x in row]
            if "?" in row_types or (types is not None and row_types != types):
                return None
            types = row_types
        name = f"{self.prefix}{len(self.arrays)}"
        self.arrays[name] = np.array(seq, dtype=float).reshape(len(seq), width)
        return {"$table": name, "types": "".join(types)}


class _Decoder:
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
            raise StateFormatError(f"feed checkpoint holds a {v['$object']} where this build has none")
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


# ------------------------------------------------------------ the monitor
def snapshot_monitor(monitor: Any, prefix: str = "monitor_") -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """The running state of a FeedMonitor and its rules: (JSON-ready dict, arrays)."""
    encoder = _Encoder(prefix)
    attrs = {k: encoder.value(v) for k, v in vars(monitor).items() if k not in MONITOR_SKIP}
    return {"$object": type(monitor).__qualname__, "attrs": attrs}, encoder.arrays


def _restore_into(target: Any, saved: dict[str, Any], decoder: _Decoder, where: str) -> None:
    if saved.get("$object") != type(target).__qualname__:
        raise StateFormatError(f"feed checkpoint: {where} was a {saved.get('$object')}, "
                               f"this build has a {type(target).__qualname__}")
    current = vars(target)
    for name, value in saved["attrs"].items():
        path = f"{where}.{name}"
        here = current.get(name)  # an attribute a rule sets only when needed may be absent here
        if isinstance(value, dict) and "$object" in value:
            if name not in current:
                raise StateFormatError(f"feed checkpoint: {path} does not exist in this build")
            _restore_into(here, value, decoder, path)
        elif isinstance(value, dict) and "$dict" in value and isinstance(here, dict) \
                and any(isinstance(x, dict) and "$object" in x for x in value["$dict"].values()):
            if set(here) != set(value["$dict"]):
                raise StateFormatError(f"feed checkpoint: {path} holds {sorted(value['$dict'])}, "
                                       f"this monitor has {sorted(here)}")
            for key, item in value["$dict"].items():
                if isinstance(item, dict) and "$object" in item:
                    _restore_into(here[key], item, decoder, f"{path}[{key!r}]")
                else:
                    here[key] = decoder.value(item)
        else:
            setattr(target, name, decoder.value(value))


def restore_monitor(monitor: Any, saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> None:
    """Write a :func:`snapshot_monitor` back into a monitor built with the same configuration."""
    _restore_into(monitor, saved, _Decoder(arrays), "monitor")


def saved_open_events(saved: dict[str, Any], arrays: dict[str, np.ndarray]) -> list[AlarmEvent]:
    """The episodes that were open in a saved monitor (to close them when it cannot be restored)."""
    decoder = _Decoder(arrays)
    lifecycles = saved.get("attrs", {}).get("lifecycles", {}).get("$dict", {})
    out = []
    for life in lifecycles.values():
        event = life.get("attrs", {}).get("_event")
        if event is not None:
            out.append(decoder.value(event))
    return out


# ----------------------------------------------------------------- the feed
def _fingerprint(config: MonitorConfig) -> str:
    """The rules' configuration as text: rule states are restored only into an equal one."""
    return json.dumps(dataclasses.asdict(config), sort_keys=True, default=repr)


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
        "thresholds": feed.thresholds,
        "thresholds_config": feed.thresholds_config,
        "monitor_fingerprint": _fingerprint(feed.monitor.config),
        "monitor": monitor_state,
        "diagnostics": {"since_check": feed.diagnostics.since_check, "last": feed.diagnostics.last},
        "last_diag_refit_slot": feed.last_diag_refit_slot,
        "refit_in_flight": in_flight,
        "last_refit_error": feed.last_refit_error,
        "request_seq": feed.request_seq,
        "stats": {"readings": feed.readings, "rejects": feed.rejects, "last_time": encode_time(feed.last_time),
                  "last_value": feed.last_value, "last_seen": encode_time(feed.last_seen),
                  "meter_resets": feed.meter_resets},
    }
    arrays["stream"] = np.frombuffer(feed.monitor.stream.to_bytes(), dtype=np.uint8)
    arrays["history"] = feed.history.to_array()
    arrays["diagnostics_z"] = np.array(feed.diagnostics.z, dtype=float)
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
    thresholds = header["thresholds"]
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
    if _fingerprint(config) == header["monitor_fingerprint"]:
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
    feed.history = RingBuffer(settings.refit_window_points, arrays["history"])
    feed.diagnostics.z.extend(arrays["diagnostics_z"].tolist())
    feed.diagnostics.since_check = int(header["diagnostics"]["since_check"])
    feed.diagnostics.last = header["diagnostics"]["last"]
    feed.last_diag_refit_slot = header["last_diag_refit_slot"]
    feed.last_refit_error = header["last_refit_error"]
    feed.request_seq = int(header["request_seq"])
    if header["refit_in_flight"] is not None and feed.refit_due is None:
        reason, full = header["refit_in_flight"]
        again = " (requested again after a restart)"
        feed.refit_due = (reason if reason.endswith(again) else reason + again, bool(full))
    feed.state = "watching"
    out.state_changes.append(StateChange(
        feed_id, "new", "watching", feed.last_time or feed.at_last_slot(),
        f"resumed from checkpoint at slot {feed.next_slot} with model version {model_version} "
        f"({feed.model_label}); no learning phase; {resumed}"))
    return feed, out
