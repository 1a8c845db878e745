"""Where the store lives by default: ``$STATE_DIRECTORY`` under systemd, else beside the config.

With ``StateDirectory=leadline`` systemd creates ``/var/lib/leadline`` for the
service and passes its path in ``$STATE_DIRECTORY`` (systemd.exec(5); several
directories are separated by ``:``, the first is taken). A config without
``[store] url`` then keeps the SQLite store, and with it the checkpoints and
CSV offsets, in that directory. The review commands run from a shell do not
see the variable: give ``[store] url`` explicitly in a config both use (the
example config does).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Mapping

DEFAULT_STORE_FILE = "leadline.db"


def state_directory(environ: Mapping[str, str] | None = None) -> Path | None:
    """The first directory of ``$STATE_DIRECTORY``, or None when it is unset or empty."""
    value = (os.environ if environ is None else environ).get("STATE_DIRECTORY", "")
    first = value.split(":")[0].strip()
    return Path(first) if first else None


def default_store_path(config_dir: Path, environ: Mapping[str, str] | None = None) -> Path:
    """``$STATE_DIRECTORY/leadline.db`` when systemd set it, else ``leadline.db`` beside the config."""
    return (state_directory(environ) or config_dir) / DEFAULT_STORE_FILE


__all__ = ["DEFAULT_STORE_FILE", "default_store_path", "state_directory"]
