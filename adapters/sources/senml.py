"""SenML packs (RFC 8428, JSON form) -> resolved numeric values.

Resolution follows RFC 8428:

* Base fields (``bn``, ``bt``, ``bu``, ``bv``, ``bs``, ``bver``) apply to
  their own record and every later one, until a record sets them again
  (section 4).
* Name = ``bn`` + ``n`` (section 4.5.1); it must be non-empty, use only
  ``A-Z a-z 0-9 - : . / _`` and start with a letter or digit.
* Time = ``bt`` + ``t``, a missing one counting as 0 (section 4.5.3). A
  resolved time below 2**28 is relative to "now", here the arrival time of
  the message; 0 means "now".
* Value = ``bv`` + ``v``, a missing one counting as 0 (section 4.5.4);
  with ``use_sum=True`` a record without ``v`` gives ``bs`` + ``s`` instead.
* Unit = ``u``, else ``bu`` (section 4.5.2).
* A field whose label ends in ``_`` is a mandatory extension we do not know:
  the whole pack is rejected (section 4.4, ``unknown_mandatory_field``).
  Other unknown fields are ignored.
* ``bver`` defaults to 10; a pack with a higher version, or with records of
  different versions, is rejected (section 4.4, ``unsupported_version``,
  ``bad_version``).

Records leadline cannot use are rejected one by one, the rest of the pack is
kept: a string, boolean or data value (``vs``, ``vb``, ``vd``:
``non_numeric``), a record with no value (``missing_value``), a bad name
(``bad_name``). A record holding only base fields (such as
``{"bn": "urn:dev:ow:10e2073a01080063:"}`` in section 5.1.7) carries no
measurement and yields nothing.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from leadline.adapters.sources.payloads import (
    DEFAULT_MAX_BYTES,
    ParsedValue,
    ParseResult,
    check_size_and_decode,
    load_json,
)
from leadline.adapters.sources.timeparse import epoch_seconds_to_utc
from leadline.detector.errors import RejectError

#: The SenML version this parser understands (RFC 8428 section 4.4).
SENML_VERSION = 10
#: Times below this are relative to "now" (RFC 8428 section 4.5.3).
RELATIVE_TIME_LIMIT_S = 2**28

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9\-:./_]*\Z")
_BASE_FIELDS = frozenset({"bn", "bt", "bu", "bv", "bs", "bver"})
_NUMBER_FIELDS = ("bt", "bv", "bs", "t", "v", "s", "ut")
_TEXT_FIELDS = ("bn", "bu", "n", "u", "vs", "vd")


def _is_number(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, float))


def _is_whole(value: int | float) -> bool:
    """An int, or a finite float without a fraction (``1e400`` parses as infinity)."""
    return isinstance(value, int) or (math.isfinite(value) and value == int(value))


@dataclass(frozen=True)
class SenmlPayload:
    """Parser of RFC 8428 JSON packs.

    Parameters
    ----------
    max_bytes : int
        Size limit of a payload.
    use_sum : bool
        Take ``bs`` + ``s`` for records that carry a sum and no value
        (cumulative meter registers).
    """

    max_bytes: int = DEFAULT_MAX_BYTES
    use_sum: bool = False

    def parse(self, payload: bytes, now_s: float) -> ParseResult:
        text = check_size_and_decode(payload, self.max_bytes)
        return self.resolve(load_json(text, payload), now_s, payload)

    def resolve(self, pack: Any, now_s: float, raw: bytes = b"") -> ParseResult:
        """Resolve an already decoded pack (see the module notes)."""
        if not isinstance(pack, list):
            raise RejectError(
                "not_senml",
                f"expected a JSON array of SenML records (RFC 8428 section 5), got {type(pack).__name__}",
                raw=raw,
            )
        version: int | None = None
        for index, record in enumerate(pack):
            if not isinstance(record, dict):
                raise RejectError(
                    "not_senml",
                    f"record {index}: expected a JSON object (RFC 8428 section 5), got {type(record).__name__}",
                    raw=raw,
                )
            for label in record:
                if label.endswith("_"):
                    raise RejectError(
                        "unknown_mandatory_field",
                        f"record {index}: field {label[:40]!r} ends in '_' and is not understood "
                        "(RFC 8428 section 4.4 requires an error)",
                        raw=raw,
                    )
            if "bver" in record:
                bver = record["bver"]
                if not _is_number(bver) or not _is_whole(bver) or bver < 1:
                    raise RejectError(
                        "bad_version", f"record {index}: bver {bver!r}; expected a positive integer", raw=raw
                    )
                if version is not None and int(bver) != version:
                    raise RejectError(
                        "bad_version",
                        f"record {index}: bver {bver!r} differs from {version}; all records of a pack "
                        "must have the same version (RFC 8428 section 4.4)",
                        raw=raw,
                    )
                version = int(bver)
        if version is not None and version > SENML_VERSION:
            raise RejectError(
                "unsupported_version",
                f"bver {version}; this reader understands SenML version {SENML_VERSION} and lower "
                "(RFC 8428 section 4.4)",
                raw=raw,
            )

        values: list[ParsedValue] = []
        rejects: list[RejectError] = []
        base_name = ""
        base_time = 0.0
        base_unit: str | None = None
        base_value: float | None = None
        base_sum: float | None = None
        for index, record in enumerate(pack):
            problem = self._type_problem(record)
            if problem is not None:
                raise RejectError("not_senml", f"record {index}: {problem}", raw=raw)
            if "bn" in record:
                base_name = record["bn"]
            if "bt" in record:
                base_time = float(record["bt"])
            if "bu" in record:
                base_unit = record["bu"]
            if "bv" in record:
                base_value = float(record["bv"])
            if "bs" in record:
                base_sum = float(record["bs"])
            if all(label in _BASE_FIELDS for label in record):
                continue  # a record of base fields only: no measurement
            name = base_name + record.get("n", "")
            if not _NAME.match(name):
                rejects.append(
                    RejectError(
                        "bad_name",
                        f"record {index}: name {name[:60]!r}; expected letters, digits and '-:./_', "
                        "starting with a letter or digit (RFC 8428 section 4.5.1)",
                        raw=raw,
                    )
                )
                continue
            if "v" in record or (base_value is not None and not any(k in record for k in ("vs", "vb", "vd", "s"))):
                value = (base_value or 0.0) + float(record.get("v", 0.0))
            elif self.use_sum and ("s" in record or base_sum is not None) and not any(
                k in record for k in ("vs", "vb", "vd")
            ):
                value = (base_sum or 0.0) + float(record.get("s", 0.0))
            elif any(k in record for k in ("vs", "vb", "vd")):
                kind = next(k for k in ("vs", "vb", "vd") if k in record)
                rejects.append(
                    RejectError(
                        "non_numeric",
                        f"record {index} ({name}): carries {kind!r}; expected a numeric value 'v' "
                        "(RFC 8428 section 4.2)",
                        raw=raw,
                    )
                )
                continue
            else:
                reason = "a sum 's' but no value 'v' (set use_sum)" if "s" in record else "no value field"
                rejects.append(
                    RejectError("missing_value", f"record {index} ({name}): {reason} (RFC 8428 section 4.2)", raw=raw)
                )
                continue
            if not math.isfinite(value):
                rejects.append(RejectError("not_finite", f"record {index} ({name}): value is not finite", raw=raw))
                continue
            time_s = base_time + float(record.get("t", 0.0))
            if not math.isfinite(time_s):
                rejects.append(RejectError("bad_time", f"record {index} ({name}): time is not finite", raw=raw))
                continue
            if time_s < RELATIVE_TIME_LIMIT_S:
                time_s = now_s + time_s  # relative to "now" (RFC 8428 section 4.5.3)
            try:
                timestamp = epoch_seconds_to_utc(time_s, raw=raw)
            except RejectError as exc:
                rejects.append(RejectError(exc.reason, f"record {index} ({name}): {exc.detail}", raw=raw))
                continue
            values.append(ParsedValue(value, timestamp, name, record.get("u", base_unit)))
        return ParseResult(values, rejects)

    @staticmethod
    def _type_problem(record: dict[str, Any]) -> str | None:
        for label in _NUMBER_FIELDS:
            if label in record:
                value = record[label]
                if not _is_number(value):
                    return f"field {label!r} must be a number (RFC 8428 section 4.3), got {type(value).__name__}"
                try:
                    if not math.isfinite(float(value)):
                        return f"field {label!r} is not finite"
                except OverflowError:
                    return f"field {label!r} is too large for a double"
        for label in _TEXT_FIELDS:
            if label in record and not isinstance(record[label], str):
                return f"field {label!r} must be a string (RFC 8428 section 4.3), got {type(record[label]).__name__}"
        if "vb" in record and not isinstance(record["vb"], bool):
            return f"field 'vb' must be a boolean (RFC 8428 section 4.3), got {type(record['vb']).__name__}"
        return None
