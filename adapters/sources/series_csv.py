"""Read a whole CSV of one feed's history for ``leadline score``.

Accepted layouts (a header row is required):

* ``timestamp,value``
* ``timestamp,series,value``, with the series chosen by ``--series``

Timestamps are ISO 8601 (``2026-05-04T06:15:00+02:00`` or ``...Z``; a time
without an offset is taken as UTC) or epoch seconds. Every problem is
reported with the file, the line number and what was expected.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from leadline.detector.errors import DataError, RejectError

from .timeparse import TimeParser


#: The sources' parsers (:mod:`.sources.timeparse`): epoch seconds, and ISO 8601 with UTC for a time without offset.
_EPOCH_S = TimeParser("epoch_s")
_ISO_UTC = TimeParser("iso8601", time_zone="UTC")


def parse_timestamp(text: str) -> float:
    """Epoch seconds from ISO 8601 text or a number of epoch seconds."""
    text = text.strip()
    for parser in (_EPOCH_S, _ISO_UTC):
        try:
            stamp, _ = parser(text)
        except RejectError:
            continue
        return stamp.timestamp()
    raise ValueError(f"time {text!r} is neither ISO 8601 nor epoch seconds")


def read_series_csv(path: str | Path, series: str | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Timestamps (epoch s) and values of one series, in file order.

    Raises
    ------
    DataError
        For a missing file, a bad header, a non-numeric cell, an unparsable
        time, or a duplicated or unsorted timestamp; the message names the
        line and what was expected.
    """
    path = Path(path)
    try:
        handle = path.open(newline="", encoding="utf-8")
    except OSError as exc:
        raise DataError(f"{path}: cannot open: {exc.strerror}") from exc
    with handle:
        reader = csv.reader(handle)
        try:
            header = [h.strip().lower() for h in next(reader)]
        except StopIteration:
            raise DataError(f"{path}: the file is empty; expected a header 'timestamp,value'") from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise DataError(f"{path}:1: unreadable header: {exc}") from exc
        if "timestamp" not in header or "value" not in header:
            raise DataError(f"{path}:1: header {','.join(header)!r} must name the columns 'timestamp' and 'value'")
        i_time, i_value = header.index("timestamp"), header.index("value")
        i_series = header.index("series") if "series" in header else None
        if series is not None and i_series is None:
            raise DataError(f"{path}:1: --series {series!r} given but the header has no 'series' column")
        times: list[float] = []
        values: list[float] = []
        seen_series: set[str] = set()
        line = 1
        try:
            for row in reader:
                line = reader.line_num
                if not row or all(not cell.strip() for cell in row):
                    continue
                if len(row) != len(header):
                    raise DataError(f"{path}:{line}: expected {len(header)} columns as in the header, got {len(row)}")
                if i_series is not None:
                    name = row[i_series].strip()
                    seen_series.add(name)
                    if series is None:
                        raise DataError(f"{path}:{line}: the file has a 'series' column; choose one with --series")
                    if name != series:
                        continue
                try:
                    t = parse_timestamp(row[i_time])
                except ValueError as exc:
                    raise DataError(f"{path}:{line}: {exc}") from None
                cell = row[i_value].strip()
                if cell == "":
                    value = math.nan
                else:
                    try:
                        value = float(cell)
                    except ValueError:
                        raise DataError(f"{path}:{line}: value {cell!r} is not a number") from None
                    if not math.isfinite(value):
                        raise DataError(f"{path}:{line}: value {cell!r} is not a finite number")
                if times and t == times[-1]:
                    raise DataError(f"{path}:{line}: timestamp {row[i_time].strip()!r} repeats the previous row; "
                                    "expected strictly increasing timestamps")
                if times and t < times[-1]:
                    raise DataError(f"{path}:{line}: timestamp {row[i_time].strip()!r} is earlier than the previous "
                                    "row; expected rows sorted by time")
                times.append(t)
                values.append(value)
        except csv.Error as exc:
            raise DataError(f"{path}:{line}: malformed CSV: {exc}") from exc
        except UnicodeDecodeError as exc:
            raise DataError(f"{path}: not UTF-8 text near line {line + 1}") from exc
    if not times:
        extra = f" for series {series!r} (found {sorted(seen_series)[:10]})" if series else ""
        raise DataError(f"{path}: no data rows{extra}")
    return np.array(times), np.array(values)
