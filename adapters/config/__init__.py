"""The TOML config file: its schema, typed reading, per-feed options, sources and shifts.

Modules: :mod:`.file` (the schema in its docstring, the dataclasses,
:func:`load_config`), :mod:`.values` (typed reading of one TOML table,
problems naming the key path), :mod:`.feeds` (per-feed options and
overrides), :mod:`.sources` (``[[sources.csv]]`` / ``[[sources.mqtt]]``
entries), :mod:`.shifts` (operator shifts as UTC windows).
"""

from .file import Config, config_from_text, load_config
from .shifts import ShiftWindow, shift_window

__all__ = ["Config", "ShiftWindow", "config_from_text", "load_config", "shift_window"]
