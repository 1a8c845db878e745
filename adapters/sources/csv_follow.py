"""Follow growing CSV files, as ``tail -F`` would, without losing or repeating a row.

A :class:`CsvFollower` watches a glob (one path, or one file a day) and turns
every complete line into readings with :class:`~leadline.adapters.sources.csv_rows.RowParser`.

Positions
---------
Files are read in binary mode with our own byte counter. A reading's
``origin`` is a :class:`CsvOrigin`: the file's identity, the line number and
the byte offset just past the line. :meth:`CsvFollower.durable_marks` turns
the readings handed to the store into :class:`~leadline.adapters.ports.SourceOffset`
marks (one per path), which the service commits in the same transaction as
the events. At start-up the follower takes those marks back
(``start_offsets``) and resumes exactly after the last committed line.
Lines that give no reading (the header, blank lines, rejected rows) are
folded into the next mark, so that they are not read, and counted, twice.
The service should call ``durable_marks`` after every poll, an empty one
too.

Rules
-----
* A half-written last line is buffered until its newline arrives; offsets
  only ever stand at line ends.
* Rotation by rename: the path's ``(st_dev, st_ino)`` changes. The old file
  is read to its end first (until it has not grown for ``rotate_grace_s``;
  a final line without newline is then taken as complete), then the new file
  is read from its start. After a restart, a mark whose inode no longer sits
  at the path is looked for in the same directory (``flow.csv.1``), and that
  file is finished first.
* Truncation (copytruncate): the size drops below the read position; the
  file is read again from byte 0. Rows written between the copy and the
  truncation are lost by that method itself, and a file truncated and
  regrown past the old position between two polls cannot be detected.
* A file found at start-up with no mark is read from the start with
  ``from_start`` (backfill), or when other marks exist (it appeared while the
  follower was down); otherwise reading starts at its end, as ``tail`` does.
  A file appearing later is always read from its start.
* The glob must not match the rotated names (``flow.csv.1``): a file whose
  identity is already followed under another path is skipped.
* Bad rows never stop the follower: they are counted by reason and sampled
  (:meth:`CsvFollower.take_rejects`). A file whose header lacks the
  configured columns is rejected once (``bad_header``) and not read.
* Readings of a new feed beyond ``max_feeds`` are rejected (``feed_limit``,
  :mod:`.feed_gate`); their lines count as reading-free for the marks.
"""

from __future__ import annotations

import glob
import logging
import os
import time
from typing import Callable, Mapping, Sequence

from leadline.adapters.ports import RejectSample, SourceOffset
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.sources.feed_gate import DEFAULT_MAX_FEEDS, FeedGate
from leadline.adapters.sources.rejects import RejectDelta, RejectLog
from leadline.detector.errors import RejectError, SourceError
from leadline.detector.readings import Reading

from leadline.adapters.sources.csv_tail import CsvOrigin, FileIdentity, _find_last_newline, _Tail

logger = logging.getLogger("leadline.sources.csv")


class CsvFollower:
    """A :class:`~leadline.adapters.ports.Source` following CSV files.

    Parameters
    ----------
    name : str
        The configured source's name (the store keys marks by it and the path).
    pattern : str
        A path or a glob such as ``/data/meters/flow-*.csv``.
    layout : CsvLayout
        How rows look.
    start_offsets : mapping of path -> SourceOffset
        The committed marks of this source, from the store at start-up.
    from_start : bool
        Read files without a mark from byte 0 (backfill).
    read_chunk_bytes : int
        Bytes per read call.
    rotate_grace_s : float
        How long a rotated-away file must stay unchanged before it is closed.
    rescan_interval_s : float
        How often the glob is expanded again.
    poll_interval_s : float
        Sleep between empty looks while :meth:`poll` waits.
    max_line_bytes : int
        Longer lines are rejected (``line_too_long``).
    max_feeds : int
        Distinct feeds this source may create; readings of further new
        feeds are rejected (``feed_limit``).
    """

    def __init__(
        self,
        name: str,
        pattern: str,
        layout: CsvLayout,
        start_offsets: Mapping[str, SourceOffset] | None = None,
        from_start: bool = False,
        read_chunk_bytes: int = 1 << 20,
        rotate_grace_s: float = 1.0,
        rescan_interval_s: float = 1.0,
        poll_interval_s: float = 0.1,
        max_line_bytes: int = 1 << 20,
        clock: Callable[[], float] = time.monotonic,
        reject_log: RejectLog | None = None,
        max_feeds: int = DEFAULT_MAX_FEEDS,
    ):
        self.name = name
        self.pattern = pattern
        self.layout = layout
        self.start_offsets = {}
        for path, mark in (start_offsets or {}).items():
            if mark.source != name:
                logger.warning("%s: ignoring the mark of source %r for %s", name, mark.source, path)
                continue
            self.start_offsets[path] = mark
        self.from_start = from_start
        self.read_chunk_bytes = read_chunk_bytes
        self.rotate_grace_s = rotate_grace_s
        self.rescan_interval_s = rescan_interval_s
        self.poll_interval_s = poll_interval_s
        self.max_line_bytes = max_line_bytes
        self._clock = clock
        self._rejects = reject_log or RejectLog(name)
        self._feeds = FeedGate(name, self._rejects.add, max_feeds)
        self._tails: dict[str, _Tail] = {}  # the live tail of each path
        self._by_ident: dict[FileIdentity, _Tail] = {}
        self._started = False
        self._stopped = False
        self._first_scan_done = False
        self._next_scan = 0.0
        self._lines = 0
        self._readings = 0
        self._missing_closed = 0
        self._had_marks = bool(self.start_offsets)

    # -- Source protocol ----------------------------------------------------------
    def start(self) -> None:
        if self._started:
            return
        self._started = True
        self._scan()

    def poll(self, max_items: int, timeout_s: float) -> list[Reading]:
        """Readings of complete lines, up to about ``max_items`` (lines are not split)."""
        if not self._started:
            self.start()
        out: list[Reading] = []
        if self._stopped:
            return out
        deadline = self._clock() + timeout_s
        while True:
            consumed = self._step(out, max(1, max_items))
            if out or consumed:
                break
            now = self._clock()
            if now >= deadline:
                break
            time.sleep(min(self.poll_interval_s, deadline - now))
        self._readings += len(out)
        return out

    def durable_marks(self, readings: Sequence[Reading]) -> list[SourceOffset]:
        """One mark per path, covering ``readings`` and any reading-free lines after them."""
        last: dict[str, CsvOrigin] = {}
        paths = {ident.path for ident in self._by_ident}
        for reading in reversed(readings):  # the last reading of each path counts
            origin = reading.origin
            if type(origin) is CsvOrigin and origin.file.path not in last:
                last[origin.file.path] = origin
                if len(last) >= len(paths):
                    break
        marks: dict[str, SourceOffset] = {}
        for path, origin in last.items():
            tail = self._by_ident.get(origin.file)
            if tail is None:
                continue  # not ours
            offset = tail.gap.get(origin.end_offset, origin.end_offset)
            if origin.end_offset >= tail.issued_end:
                tail.unmarked = False
            if tail.gap:
                tail.gap = {k: v for k, v in tail.gap.items() if k > origin.end_offset}
            marks[path] = tail.mark(offset)
        # Files with nothing outstanding whose position moved (rejects only, a
        # header, a fresh start at the end of a file or at 0 after rotation).
        for path, tail in list(self._tails.items()):
            if tail.unmarked:
                continue
            others = [t for t in self._by_ident.values() if t.ident.path == path and t is not tail]
            if any(t.unmarked for t in others):
                continue
            if path in marks and last[path].file == tail.ident:
                continue
            if tail.marked != tail.consumed_end or path in marks:
                tail.gap.clear()
                marks[path] = tail.mark(tail.consumed_end)
        # Forget closed tails that are fully marked.
        for ident, tail in list(self._by_ident.items()):
            if tail.closed and not tail.unmarked and self._tails.get(ident.path) is not tail:
                del self._by_ident[ident]
        return list(marks.values())

    def ack(self, readings: Sequence[Reading]) -> None:
        """Nothing to do: CSV positions travel as marks in the commit itself."""

    def take_rejects(self) -> list[RejectSample]:
        return self._rejects.take()

    def take_reject_counts(self) -> list[RejectDelta]:
        """Exact reject counts per reason since the last call (the samples are capped)."""
        return self._rejects.take_counts()

    def stop(self) -> None:
        self._stopped = True
        for tail in self._by_ident.values():
            tail.close()

    # -- extras -------------------------------------------------------------------
    def counts(self) -> dict[str, object]:
        """Lines consumed, readings issued, empty values (missing), rejects by reason."""
        missing = sum(t.parser.missing for t in self._by_ident.values() if t.parser is not None and not t.closed)
        return {
            "lines": self._lines,
            "readings": self._readings,
            "missing": missing + self._missing_closed,
            "rejected": self._rejects.total(),
            "rejects_by_reason": self._rejects.counts(),
        }

    def followed_paths(self) -> list[str]:
        return sorted(self._tails)

    def finish(self) -> list[Reading]:
        """The readings of each file's final line without newline, taken as complete.

        For a replay that reads files to their end once: call it after
        :meth:`poll` returned nothing, then :meth:`stop`.
        """
        out: list[Reading] = []
        for path in sorted(self._tails):
            tail = self._tails[path]
            if not tail.closed:
                tail.flush_final_line(out)
        self._readings += len(out)
        return out

    # -- internals ----------------------------------------------------------------
    def _reject(self, error: RejectError) -> None:
        self._rejects.add(error)

    def _step(self, out: list[Reading], limit: int) -> int:
        now = self._clock()
        if now >= self._next_scan:
            self._scan()
        consumed = 0
        for path in sorted(self._tails):
            tail = self._tails[path]
            while len(out) < limit:
                if tail.line_index < len(tail.lines):
                    consumed += tail.parse(out, limit)
                    continue
                if tail.fill():
                    continue
                consumed += self._at_end(tail, out)
                break
            if len(out) >= limit:
                break
        return consumed

    def _at_end(self, tail: _Tail, out: list[Reading]) -> int:
        """Checks at end of file: truncation, rotation, drain timeout."""
        path = tail.ident.path
        try:
            size_now = os.fstat(tail.fd).st_size
        except OSError:
            size_now = tail.read_pos
        if size_now < tail.read_pos and not tail.draining:
            logger.warning(
                "%s: %s shrank from %d to %d bytes (truncated); reading again from byte 0",
                self.name, path, tail.read_pos, size_now,
            )
            self._replace_after_truncation(tail)
            return 1
        if tail.draining:
            if self._clock() >= tail.drain_deadline:
                before = len(out)
                tail.flush_final_line(out)
                tail.close()
                if self._tails.get(path) is tail:
                    del self._tails[path]
                if tail.parser is not None:
                    self._missing_closed += tail.parser.missing
                logger.info("%s: finished rotated file %s at byte %d", self.name, tail.read_path, tail.consumed_end)
                self._open_path(path, from_offset=0)
                return 1 + (len(out) - before)
            return 0
        try:
            st = os.stat(path)
            same = (st.st_dev, st.st_ino) == (tail.ident.device, tail.ident.inode)
        except FileNotFoundError:
            same = False
        if not same:
            logger.info("%s: %s was rotated; finishing the old file before the new one", self.name, path)
            tail.draining = True
            tail.drain_deadline = self._clock() + self.rotate_grace_s
        return 0

    def _replace_after_truncation(self, tail: _Tail) -> None:
        old = tail.ident
        ident = FileIdentity(old.path, old.device, old.inode, old.generation + 1)
        os.lseek(tail.fd, 0, os.SEEK_SET)
        new = _Tail(self, ident, tail.fd, tail.read_path, 0, None)
        tail.owns_fd = False
        tail.closed = True
        if tail.parser is not None:
            self._missing_closed += tail.parser.missing
        self._tails[old.path] = new
        self._by_ident[ident] = new

    def _scan(self) -> None:
        self._next_scan = self._clock() + self.rescan_interval_s
        initial = not self._first_scan_done
        self._first_scan_done = True
        for path in sorted(glob.glob(self.pattern)):
            if path in self._tails or not os.path.isfile(path):
                continue
            self._open_path(path, from_offset=None if initial else 0)

    def _open_path(self, path: str, from_offset: int | None) -> None:
        """Start following ``path``; ``from_offset`` None applies the start-up rules."""
        try:
            fd = os.open(path, os.O_RDONLY)
        except FileNotFoundError:
            return
        except OSError as exc:
            raise SourceError(f"{self.name}: cannot open {path}: {exc}") from exc
        st = os.fstat(fd)
        key = (st.st_dev, st.st_ino)
        if any((t.ident.device, t.ident.inode) == key and not t.closed for t in self._by_ident.values()):
            os.close(fd)
            return  # already followed under another path
        mark = self.start_offsets.pop(path, None)
        if mark is None:
            if from_offset is not None:
                start = from_offset
            elif self.from_start or self._had_marks:
                start = 0
            else:
                start = _find_last_newline(fd, st.st_size)
            self._add_tail(path, fd, st, path, start, None)
            return
        if (mark.device, mark.inode) == key:
            if st.st_size >= mark.offset_bytes:
                self._add_tail(path, fd, st, path, mark.offset_bytes, mark.offset_bytes)
            else:
                logger.warning(
                    "%s: %s is shorter (%d bytes) than its mark (%d): truncated while stopped; reading from 0",
                    self.name, path, st.st_size, mark.offset_bytes,
                )
                self._add_tail(path, fd, st, path, 0, None)
            return
        old_path = self._find_inode(os.path.dirname(path) or ".", mark.device, mark.inode)
        if old_path is None:
            logger.info("%s: %s was replaced while stopped; reading the new file from 0", self.name, path)
            self._add_tail(path, fd, st, path, 0, None)
            return
        os.close(fd)
        old_fd = os.open(old_path, os.O_RDONLY)
        old_st = os.fstat(old_fd)
        start = mark.offset_bytes if old_st.st_size >= mark.offset_bytes else 0
        logger.info("%s: finishing %s (rotated from %s) from byte %d", self.name, old_path, path, start)
        tail = self._add_tail(path, old_fd, old_st, old_path, start, mark.offset_bytes if start else None)
        tail.draining = True
        tail.drain_deadline = self._clock() + self.rotate_grace_s

    def _add_tail(self, path: str, fd: int, st: os.stat_result, read_path: str, start: int, marked: int | None) -> _Tail:
        ident = FileIdentity(path, st.st_dev, st.st_ino, 0)
        while ident in self._by_ident:
            ident = FileIdentity(path, st.st_dev, st.st_ino, ident.generation + 1)
        os.lseek(fd, start, os.SEEK_SET)
        tail = _Tail(self, ident, fd, read_path, start, marked)
        self._tails[path] = tail
        self._by_ident[ident] = tail
        return tail

    @staticmethod
    def _find_inode(directory: str, device: int, inode: int) -> str | None:
        try:
            with os.scandir(directory) as entries:
                for entry in entries:
                    if entry.inode() == inode and entry.is_file(follow_symlinks=False):
                        if entry.stat(follow_symlinks=False).st_dev == device:
                            return entry.path
        except OSError:
            return None
        return None
