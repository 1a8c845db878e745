"""CSV rows (bytes) -> readings, for the file follower.

Layouts
-------
``long``
    One reading per row: a time column, a feed column and a value column
    (default names ``timestamp``, ``feed``, ``value``).
``wide``
    One row per time: a time column, then one column per feed. Without
    ``feed_columns`` every other column is a feed named by its header
    (prefixed by ``feed_prefix``); with it, only the mapped columns are read
    and the map gives their feed ids.

The header mapping (``time_column``, ``feed_column``, ``value_column``,
``feed_columns``) names the file's own columns. A file without a header
gives its column names in ``column_names``.

Values use ``decimal`` (``"."`` or ``","``) as decimal mark; the delimiter
must then differ from it. Times: see :mod:`leadline.adapters.sources.timeparse`.

Rejects (reason codes)
----------------------
``wrong_columns``  the row has another number of columns than the header
``bad_time``       the time cannot be read (or is a local time in a DST gap)
``non_numeric``    a value that is not a number (``1_000`` and ``1.2.3`` too)
``not_finite``     ``NaN``, ``inf`` and the like written as text
``bad_feed``       an empty feed id (long layout)
``bad_encoding``   a feed id or time that is not UTF-8
``bad_header``     a header without the configured columns

An empty value is *not* a reject: it gives a reading with value NaN (a
missing slot), counted in :attr:`RowParser.missing`. In the wide layout a bad
cell rejects only that cell; the row's other cells are kept.

Notes
-----
The fast path splits bytes on the delimiter and converts with ``float``
(which accepts bytes); a row containing a quote character goes through the
:mod:`csv` module instead. Parsed times and feed ids are cached per distinct
text (bounded), since a follower sees the same time on many rows of a long
file and the same feed names over and over.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable, Mapping, Sequence

from leadline.adapters.sources.timeparse import TimeParser
from leadline.detector.errors import ConfigError, RejectError
from leadline.detector.readings import Reading

_CACHE_LIMIT = 100_000
_NAN = math.nan
_BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True)
class CsvLayout:
    """How the rows of a CSV source look.

    Parameters
    ----------
    layout : str
        ``"long"`` or ``"wide"``.
    delimiter : str
        One character, default ``","``.
    decimal : str
        ``"."`` or ``","``.
    has_header : bool
        Whether the first line names the columns.
    column_names : sequence of str, optional
        The column names of a file without a header.
    time_column, feed_column, value_column : str
        The file's names of the time, feed and value columns.
    feed_columns : mapping, optional
        Wide layout: file column -> feed id.
    feed_prefix : str
        Prepended to every feed id read from the file.
    time_format : str
        ``"iso8601"``, ``"epoch_s"``, ``"epoch_ms"`` or a strptime pattern.
    time_zone : str, optional
        IANA zone of times without an offset.
    """

    layout: str = "long"
    delimiter: str = ","
    decimal: str = "."
    has_header: bool = True
    column_names: Sequence[str] | None = None
    time_column: str = "timestamp"
    feed_column: str = "feed"
    value_column: str = "value"
    feed_columns: Mapping[str, str] | None = None
    feed_prefix: str = ""
    time_format: str = "iso8601"
    time_zone: str | None = None

    def __post_init__(self) -> None:
        if self.layout not in ("long", "wide"):
            raise ConfigError(f"layout: expected 'long' or 'wide', got {self.layout!r}")
        if not isinstance(self.delimiter, str) or len(self.delimiter) != 1 or self.delimiter in "\r\n\"":
            raise ConfigError(f"delimiter: expected one character other than a quote or newline, got {self.delimiter!r}")
        if self.decimal not in (".", ","):
            raise ConfigError(f"decimal: expected '.' or ',', got {self.decimal!r}")
        if self.decimal == self.delimiter:
            raise ConfigError(
                f"decimal {self.decimal!r} equals the delimiter; use delimiter ';' with a decimal comma"
            )
        if not self.has_header and not self.column_names:
            raise ConfigError("column_names: required when has_header is false")
        TimeParser(self.time_format, self.time_zone, self.decimal)  # validates both

    @classmethod
    def from_mapping(cls, config: Mapping[str, Any], where: str = "csv") -> "CsvLayout":
        """Build from a config table, naming unknown keys."""
        known = set(cls.__dataclass_fields__)
        unknown = sorted(set(config) - known)
        if unknown:
            raise ConfigError(f"{where}: unknown key(s) {unknown}; expected some of {sorted(known)}")
        values = dict(config)
        if values.get("column_names") is not None:
            values["column_names"] = tuple(values["column_names"])
        if values.get("feed_columns") is not None:
            values["feed_columns"] = dict(values["feed_columns"])
        return cls(**values)


def split_header(line: bytes, layout: CsvLayout, where: str) -> list[str]:
    """Column names of a header line."""
    if line.startswith(_BOM):
        line = line[len(_BOM):]
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RejectError("bad_header", f"header is not UTF-8 ({exc.reason})", where, line) from exc
    try:
        rows = list(csv.reader([text.rstrip("\r\n")], delimiter=layout.delimiter))
    except csv.Error as exc:
        raise RejectError("bad_header", f"header cannot be split: {exc}", where, line) from exc
    return [name.strip() for name in rows[0]] if rows else []


class RowParser:
    """Turns the rows of one file into readings.

    Parameters
    ----------
    layout : CsvLayout
    header : sequence of str
        The file's column names (from its header or ``column_names``).
    path : str
        The file, for reject messages (``path:line``).

    Attributes
    ----------
    missing : int
        Empty values seen (readings with value NaN).
    cell_rejects : list of RejectError
        Wide layout: rejected single cells of the last rows; the caller
        drains it.
    """

    def __init__(self, layout: CsvLayout, header: Sequence[str], path: str):
        self.layout = layout
        self.path = path
        self.header = list(header)
        self.missing = 0
        self.cell_rejects: list[RejectError] = []
        self._sep = layout.delimiter.encode("utf-8")
        self._comma = layout.decimal == ","
        self._ncols = len(self.header)
        self._time_parser = TimeParser(layout.time_format, layout.time_zone, layout.decimal)
        self._time_cache: dict[bytes, datetime] = {}
        self._feed_cache: dict[bytes, str] = {}
        where = f"{path}:1"
        if len(set(self.header)) != len(self.header):
            raise RejectError("bad_header", f"duplicate column names in {self.header}", where)
        self._ti = self._index(layout.time_column, "time_column", where)
        if layout.layout == "long":
            self._fi = self._index(layout.feed_column, "feed_column", where)
            self._vi = self._index(layout.value_column, "value_column", where)
            self._wide: list[tuple[int, str, str]] = []
            self.parse_into = self._make_long_parser()
        else:
            if layout.feed_columns is not None:
                wide = [
                    (self._index(col, "feed_columns", where), col, layout.feed_prefix + feed)
                    for col, feed in layout.feed_columns.items()
                ]
            else:
                wide = [
                    (i, col, layout.feed_prefix + col) for i, col in enumerate(self.header) if i != self._ti
                ]
            if not wide:
                raise RejectError("bad_header", "wide layout without any feed column", where)
            self._wide = wide
            self.parse_into = self._parse_wide

    @classmethod
    def from_header_line(cls, layout: CsvLayout, line: bytes | None, path: str) -> "RowParser":
        """The parser for a file whose header line is ``line`` (None: no header)."""
        if layout.has_header:
            if line is None:
                raise RejectError("bad_header", "file has no header line", f"{path}:1")
            header = split_header(line, layout, f"{path}:1")
        else:
            header = list(layout.column_names or ())
        return cls(layout, header, path)

    def _index(self, name: str, key: str, where: str) -> int:
        try:
            return self.header.index(name)
        except ValueError:
            raise RejectError(
                "bad_header", f"{key} {name!r} is not a column; the header has {self.header}", where
            ) from None

    # -- the fast paths ---------------------------------------------------------
    def _cells(self, line: bytes, line_number: int) -> list[bytes]:
        cells = line.split(self._sep)
        if len(cells) != self._ncols:
            if b'"' in line:
                cells = self._quoted(line, line_number)
            if len(cells) != self._ncols:
                raise RejectError(
                    "wrong_columns",
                    f"expected {self._ncols} columns ({', '.join(self.header)}), got {len(cells)}",
                    f"{self.path}:{line_number}",
                    line,
                )
        elif b'"' in line:
            cells = self._quoted(line, line_number)
        return cells

    def _quoted(self, line: bytes, line_number: int) -> list[bytes]:
        try:
            text = line.decode("utf-8")
            rows = list(csv.reader(io.StringIO(text), delimiter=self.layout.delimiter, strict=True))
        except (UnicodeDecodeError, csv.Error) as exc:
            raise RejectError(
                "wrong_columns", f"row cannot be split ({exc})", f"{self.path}:{line_number}", line
            ) from exc
        if len(rows) != 1:
            raise RejectError("wrong_columns", "row holds a line break inside quotes", f"{self.path}:{line_number}", line)
        return [cell.encode("utf-8") for cell in rows[0]]

    def _time(self, cell: bytes, line_number: int, line: bytes) -> datetime:
        where = f"{self.path}:{line_number}"
        try:
            text = cell.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise RejectError("bad_encoding", f"time is not UTF-8 ({exc.reason})", where, line) from exc
        timestamp, cacheable = self._time_parser(text, where, line)
        if cacheable:
            if len(self._time_cache) >= _CACHE_LIMIT:
                self._time_cache.clear()
            self._time_cache[cell] = timestamp
        return timestamp

    def _feed(self, cell: bytes, line_number: int, line: bytes) -> str:
        where = f"{self.path}:{line_number}"
        try:
            feed = cell.decode("utf-8").strip()
        except UnicodeDecodeError as exc:
            raise RejectError("bad_encoding", f"feed id is not UTF-8 ({exc.reason})", where, line) from exc
        if not feed:
            raise RejectError(
                "bad_feed", f"empty feed id; expected a feed name in column {self.layout.feed_column!r}", where, line
            )
        feed = self.layout.feed_prefix + feed
        if len(self._feed_cache) >= _CACHE_LIMIT:
            self._feed_cache.clear()
        self._feed_cache[cell] = feed
        return feed

    def _value(self, cell: bytes, line_number: int, line: bytes, column: str) -> float:
        """The cell as a float; NaN for an empty cell; RejectError otherwise."""
        text = cell.replace(b",", b".") if self._comma else cell
        try:
            value = float(text)
        except ValueError:
            if not cell.strip():
                self.missing += 1
                return _NAN
            raise RejectError(
                "non_numeric",
                f"column {column!r}: expected a number, got {cell[:40].decode('utf-8', 'replace')!r}",
                f"{self.path}:{line_number}",
                line,
            ) from None
        if value - value != 0.0 or b"_" in text:  # NaN or inf text; float() also takes 1_000
            finite = value - value == 0.0
            raise RejectError(
                "non_numeric" if finite else "not_finite",
                f"column {column!r}: expected a {'number without _' if finite else 'finite number'}, "
                f"got {cell[:40].decode('utf-8', 'replace')!r}",
                f"{self.path}:{line_number}",
                line,
            )
        return value

    def _make_long_parser(self) -> Callable[[bytes, int, Any, list[Reading]], None]:
        """The long-layout row parser as a closure (locals are faster than attributes)."""
        sep, ncols, ti, fi, vi = self._sep, self._ncols, self._ti, self._fi, self._vi
        time_cache, feed_cache = self._time_cache, self._feed_cache
        comma = self._comma
        cells_of, time_of, feed_of, value_of = self._cells, self._time, self._feed, self._value
        value_column = self.layout.value_column
        make = Reading

        def parse_long(line: bytes, line_number: int, origin: Any, out: list[Reading]) -> None:
            """Append the reading of one long-layout row to ``out``."""
            cells = line.split(sep)
            if len(cells) != ncols or b'"' in line:
                cells = cells_of(line, line_number)
            cell = cells[ti]
            timestamp = time_cache.get(cell)
            if timestamp is None:
                timestamp = time_of(cell, line_number, line)
            cell = cells[fi]
            feed = feed_cache.get(cell)
            if feed is None:
                feed = feed_of(cell, line_number, line)
            cell = cells[vi]
            try:
                value = float(cell.replace(b",", b".") if comma else cell)
                if value - value != 0.0 or b"_" in cell:
                    raise ValueError
            except ValueError:
                value = value_of(cell, line_number, line, value_column)
            out.append(make(feed, timestamp, value, origin))

        return parse_long

    def _parse_wide(self, line: bytes, line_number: int, origin: Any, out: list[Reading]) -> None:
        """Append the readings of one wide-layout row to ``out``."""
        cells = line.split(self._sep)
        if len(cells) != self._ncols or b'"' in line:
            cells = self._cells(line, line_number)
        cell = cells[self._ti]
        timestamp = self._time_cache.get(cell)
        if timestamp is None:
            timestamp = self._time(cell, line_number, line)
        comma = self._comma
        for index, column, feed in self._wide:
            cell = cells[index]
            try:
                value = float(cell.replace(b",", b".") if comma else cell)
                if value - value != 0.0 or b"_" in cell:
                    raise ValueError
            except ValueError:
                try:
                    value = self._value(cell, line_number, line, column)
                except RejectError as exc:
                    self.cell_rejects.append(exc)
                    continue
            out.append(Reading(feed, timestamp, value, origin))
