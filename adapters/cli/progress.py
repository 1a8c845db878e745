"""Progress of long work: one line rewritten in place on a terminal, plain lines otherwise.

``run --replay``, ``report`` over long windows and the demo's slow steps use
:class:`Progress`: on a terminal the line is rewritten (carriage return) at
most every ``tty_every_s``; when the output is a file or a pipe, a plain
line is printed at most every ``plain_every_s``, so logs stay readable and
a watcher never waits long in silence.
"""

from __future__ import annotations

import time
from typing import Callable, TextIO


class Progress:
    """Report progress of one piece of work on ``out``.

    Parameters
    ----------
    out : TextIO
    label : str
        What is being done ("replaying", "drawing incident panels").
    total : int, optional
        The amount of work, when known ("12 of 60").
    unit : str
        What is counted ("readings").
    plain_every_s, tty_every_s : float
        The shortest time between two plain lines, and between two
        rewrites of the terminal line.
    after_s : float
        Nothing is shown before the work has taken this long: quick work
        stays quiet.
    clock : callable
        Monotonic seconds (tests).
    """

    def __init__(self, out: TextIO, label: str, total: int | None = None, unit: str = "", *,
                 plain_every_s: float = 1.0, tty_every_s: float = 0.2, after_s: float = 0.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.out, self.label, self.total, self.unit = out, label, total, unit
        isatty = getattr(out, "isatty", None)
        self.tty = bool(isatty()) if callable(isatty) else False
        self.every_s = tty_every_s if self.tty else plain_every_s
        self.clock = clock
        self.started = clock()
        self._last = float("-inf")
        self.after_s = after_s
        self._shown = False

    def _text(self, done: int, note: str) -> str:
        of = f"{done:,}" + (f" of {self.total:,}" if self.total is not None else "") + (f" {self.unit}" if self.unit
                                                                                        else "")
        return f"{self.label}: {of}" + (f" ({note})" if note else "") + f" [{self.clock() - self.started:.0f} s]"

    def update(self, done: int, note: str = "", force: bool = False) -> None:
        """Show ``done`` when the last line is older than the interval (or ``force``)."""
        now = self.clock()
        if not force and (now - self._last < self.every_s or now - self.started < self.after_s):
            return
        self._last = now
        if self.tty:
            self.out.write("\r\x1b[2K" + self._text(done, note))
        else:
            self.out.write(self._text(done, note) + "\n")
        self.out.flush()
        self._shown = True

    def finish(self, done: int, note: str = "") -> None:
        """The last line, shown when anything was shown before; a terminal line is ended."""
        if not self._shown:
            return
        self.update(done, note, force=True)
        if self.tty:
            self.out.write("\n")
            self.out.flush()
