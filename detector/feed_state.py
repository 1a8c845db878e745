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
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .errors import StateFormatError
from .events import AlarmEvent
from .innovation import Innovation
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
