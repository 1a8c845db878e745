"""Files leadline creates are private to its user: mode 0600.

The SQLite store (and with it the CSV offsets and checkpoints it holds) and
exported event files carry operators' notes and the plant's readings.
:func:`restrict_umask` makes every file the service creates afterwards
0600 (directories 0700); :func:`create_private_file` creates one file with
mode 0600 before a library opens it, which covers SQLite's ``-wal`` and
``-shm`` files too (SQLite gives them the mode of the database file);
:func:`open_private_text` opens a new export for writing with mode 0600.
An existing file keeps its mode.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TextIO

PRIVATE_FILE_MODE = 0o600


def restrict_umask() -> int:
    """Add group and other bits to the process umask; return the former umask."""
    old = os.umask(0o077)
    os.umask(old | 0o077)
    return old


def create_private_file(path: str | os.PathLike[str]) -> bool:
    """Create ``path`` empty with mode 0600 unless it exists; True when created."""
    try:
        fd = os.open(Path(path), os.O_WRONLY | os.O_CREAT | os.O_EXCL, PRIVATE_FILE_MODE)
    except FileExistsError:
        return False
    os.close(fd)
    return True


def open_private_text(path: str | os.PathLike[str]) -> TextIO:
    """``open(path, "w", newline="", encoding="utf-8")``, a new file getting mode 0600."""
    fd = os.open(Path(path), os.O_WRONLY | os.O_CREAT | os.O_TRUNC, PRIVATE_FILE_MODE)
    return os.fdopen(fd, "w", newline="", encoding="utf-8")


__all__ = ["PRIVATE_FILE_MODE", "create_private_file", "open_private_text", "restrict_umask"]
