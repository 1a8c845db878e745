"""The tail of one followed CSV file: its identity, origin tokens, and reading its new bytes.

Used by :class:`~leadline.adapters.sources.csv_follow.CsvFollower`, which
owns one :class:`_Tail` per live file (rotation, truncation and the byte
marks are described in that module).
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import TYPE_CHECKING, NamedTuple

from leadline.adapters.ports import SourceOffset
from leadline.adapters.sources.csv_rows import RowParser
from leadline.detector.errors import RejectError
from leadline.detector.readings import Reading

if TYPE_CHECKING:
    from leadline.adapters.sources.csv_follow import CsvFollower

logger = logging.getLogger("leadline.sources.csv")

_SCAN_BYTES = 1 << 20

@dataclass(frozen=True, slots=True)
class FileIdentity:
    """One followed file: the configured path, its device and inode.

    ``generation`` counts truncations of the same inode.
    """

    path: str
    device: int
    inode: int
    generation: int = 0


class CsvOrigin(NamedTuple):
    """Where a reading came from: file, 1-based line number, offset past the line."""

    file: FileIdentity
    line_number: int
    end_offset: int


def _find_last_newline(fd: int, size: int) -> int:
    """Offset just past the last newline before ``size`` (0 when none)."""
    end = size
    while end > 0:
        start = max(0, end - 65536)
        chunk = os.pread(fd, end - start, start)
        index = chunk.rfind(b"\n")
        if index >= 0:
            return start + index + 1
        end = start
    return 0


def _count_newlines(fd: int, end: int) -> int:
    count = 0
    pos = 0
    while pos < end:
        chunk = os.pread(fd, min(_SCAN_BYTES, end - pos), pos)
        if not chunk:
            break
        count += chunk.count(b"\n")
        pos += len(chunk)
    return count


def _first_line(fd: int, limit: int) -> bytes | None:
    """The first line without its newline, or None if it is not complete."""
    data = b""
    pos = 0
    while len(data) < limit:
        chunk = os.pread(fd, 65536, pos)
        if not chunk:
            return None
        index = chunk.find(b"\n")
        if index >= 0:
            return data + chunk[:index]
        data += chunk
        pos += len(chunk)
    return None


class _Tail:
    """Reading state of one file identity."""

    def __init__(
        self,
        follower: "CsvFollower",
        ident: FileIdentity,
        fd: int,
        read_path: str,
        start: int,
        marked: int | None,
    ):
        self.follower = follower
        self.ident = ident
        self.fd = fd
        self.read_path = read_path
        self.read_pos = start
        self.consumed_end = start  # offset past the last consumed line
        self.issued_end = start  # offset past the last line that gave readings
        self.marked = marked  # last mark handed out (None: never)
        self.unmarked = False  # readings issued but not yet covered by a mark
        self.gap: dict[int, int] = {}  # issued_end -> consumed end of reading-free lines after it
        self.partial = b""
        self.lines: list[bytes] = []
        self.line_index = 0
        self.line_number = 0
        self.parser: RowParser | None = None
        self.failed = False
        self.skip_to_newline = False
        self.crlf = False  # set once a carriage return is seen
        self.draining = False
        self.drain_deadline = 0.0
        self.closed = False
        self.owns_fd = True
        layout = follower.layout
        if start > 0:
            self.line_number = _count_newlines(fd, start)
            if os.pread(fd, 1, start - 1) != b"\n":
                follower._reject(
                    RejectError(
                        "bad_resume_offset",
                        f"resume offset {start} is not at a line end; skipping to the next line",
                        f"{read_path}:{self.line_number + 1}",
                    )
                )
                self.skip_to_newline = True
            if layout.has_header:
                header = _first_line(fd, follower.max_line_bytes)
                self._make_parser(header)
        elif not layout.has_header:
            self._make_parser(None)

    def _make_parser(self, header: bytes | None) -> None:
        try:
            self.parser = RowParser.from_header_line(self.follower.layout, header, self.read_path)
        except RejectError as exc:
            self.failed = True
            self.follower._reject(exc)
            logger.error("%s: not reading %s: %s", self.follower.name, self.read_path, exc)

    # -- reading ----------------------------------------------------------------
    def fill(self) -> bool:
        """Read one chunk; False at end of file."""
        data = os.read(self.fd, self.follower.read_chunk_bytes)
        if not data:
            return False
        self.read_pos += len(data)
        if not self.crlf and b"\r" in data:
            self.crlf = True
        if self.draining:
            self.drain_deadline = self.follower._clock() + self.follower.rotate_grace_s
        buf = self.partial + data if self.partial else data
        if self.skip_to_newline:
            index = buf.find(b"\n")
            if index < 0:
                self.consumed_end += len(buf)
                self.partial = b""
                self._gap_to(self.consumed_end)
                return True
            self.consumed_end += index + 1
            self.line_number += 1
            self._gap_to(self.consumed_end)
            buf = buf[index + 1:]
            self.skip_to_newline = False
        index = buf.rfind(b"\n")
        if index < 0:
            self.partial = buf
            if len(buf) > self.follower.max_line_bytes:
                self.follower._reject(
                    RejectError(
                        "line_too_long",
                        f"line longer than {self.follower.max_line_bytes} bytes; skipped",
                        f"{self.read_path}:{self.line_number + 1}",
                        buf[:512],
                    )
                )
                self.consumed_end += len(buf)
                self._gap_to(self.consumed_end)
                self.partial = b""
                self.skip_to_newline = True
            return True
        if self.line_index < len(self.lines):
            self.lines = self.lines[self.line_index:] + buf[:index].split(b"\n")
        else:
            self.lines = buf[:index].split(b"\n")
        self.line_index = 0
        self.partial = buf[index + 1:]
        return True

    def _gap_to(self, end: int) -> None:
        self.gap[self.issued_end] = end

    def parse(self, out: list[Reading], limit: int) -> int:
        """Parse buffered lines into ``out`` until ``limit`` readings; lines consumed."""
        lines = self.lines
        i = self.line_index
        n = len(lines)
        if i >= n:
            return 0
        start_index = i
        pos = self.consumed_end
        number = self.line_number
        if self.parser is None and not self.failed:  # the header line
            line = lines[i]
            i += 1
            number += 1
            pos += len(line) + 1
            self._make_parser(line[:-1] if line[-1:] == b"\r" else line)
            self.gap[self.issued_end] = pos
        parser = self.parser
        parse_into = None if parser is None or self.failed else parser.parse_into
        cell_rejects = parser.cell_rejects if parser is not None else []
        reject = self.follower._reject
        screen = self.follower._feeds.screen_tail
        read_path = self.read_path
        ident = self.ident
        gap = self.gap
        issued_end = self.issued_end
        unmarked = self.unmarked
        crlf = self.crlf
        count = len(out)
        while i < n and count < limit:
            line = lines[i]
            i += 1
            end = pos + len(line) + 1
            number += 1
            pos = end
            if crlf and line[-1:] == b"\r":
                line = line[:-1]
            if parse_into is None or not line:
                gap[issued_end] = end
                continue
            try:
                parse_into(line, number, CsvOrigin(ident, number, end), out)
            except RejectError as exc:
                if not line.isspace():  # a blank line is no reject
                    reject(exc)
            if cell_rejects:
                for exc in cell_rejects:
                    reject(exc)
                cell_rejects.clear()
            new_count = len(out)
            if new_count > count:
                new_count = screen(out, count, read_path, number)
            if new_count > count:
                issued_end = end
                unmarked = True
                count = new_count
            else:
                gap[issued_end] = end
        self.issued_end = issued_end
        self.unmarked = unmarked
        self.follower._lines += i - start_index
        self.line_index = i
        self.consumed_end = pos
        self.line_number = number
        if i >= n:
            self.lines = []
            self.line_index = 0
        return i - start_index

    def flush_final_line(self, out: list[Reading]) -> None:
        """Take a final line without newline as complete (the file is finished)."""
        line, self.partial = self.partial, b""
        if not line:
            return
        end = self.consumed_end + len(line)
        self.consumed_end = end
        self.line_number += 1
        if self.skip_to_newline or self.failed or self.parser is None:
            self.gap[self.issued_end] = end
            return
        if line[-1:] == b"\r":
            line = line[:-1]
        before = len(out)
        if line.strip():
            try:
                self.parser.parse_into(line, self.line_number, CsvOrigin(self.ident, self.line_number, end), out)
            except RejectError as exc:
                self.follower._reject(exc)
            for exc in self.parser.cell_rejects:
                self.follower._reject(exc)
            self.parser.cell_rejects.clear()
            if len(out) > before:
                self.follower._feeds.screen_tail(out, before, self.read_path, self.line_number)
        self.follower._lines += 1
        if len(out) > before:
            self.issued_end = end
            self.unmarked = True
        else:
            self.gap[self.issued_end] = end

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            if self.owns_fd:
                os.close(self.fd)

    def mark(self, offset: int) -> SourceOffset:
        self.marked = offset
        return SourceOffset(
            source=self.follower.name,
            path=self.ident.path,
            device=self.ident.device,
            inode=self.ident.inode,
            offset_bytes=offset,
            updated_at=datetime.now(timezone.utc),
        )
