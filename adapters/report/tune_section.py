"""The shift report's "Settings tried" section: a ``leadline tune`` CSV as a plot and a table.

One point per setting: alarms per 8-hour shift for the site (x) against
recall over the labelled faults (y); without labels the recall axis is
empty and only the table is shown. The CSV is the one ``leadline tune
--csv`` writes; a bad file is refused with its line.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any

from leadline.detector.errors import ConfigError

from .plots import _figure, to_inline_svg

__all__ = ["read_tune_csv", "tune_svg", "tune_context"]

REQUIRED = ("setting", "alarms_per_feed_week", "alarms_per_shift")


def _number(text: str, where: str, column: str) -> float:
    if text in ("", None):
        return math.nan
    try:
        return float(text)
    except ValueError as exc:
        raise ConfigError(f"{where}: {column}: expected a number, got {text!r}") from exc


def read_tune_csv(path: str | Path) -> list[dict[str, Any]]:
    """The rows of a ``leadline tune --csv`` file: setting, alarm load, and recall/precision when labelled."""
    path = Path(path)
    try:
        with path.open(newline="", encoding="utf-8") as handle:
            reader = csv.DictReader(handle)
            missing = [c for c in REQUIRED if c not in (reader.fieldnames or ())]
            if missing:
                raise ConfigError(f"{path}:1: not a leadline tune CSV (missing {', '.join(missing)})")
            rows = []
            for number, row in enumerate(reader, start=2):
                where = f"{path}:{number}"
                rows.append({"setting": row["setting"],
                             "alarms_per_feed_week": _number(row["alarms_per_feed_week"], where,
                                                             "alarms_per_feed_week"),
                             "alarms_per_shift": _number(row["alarms_per_shift"], where, "alarms_per_shift"),
                             "recall": _number(row.get("recall", ""), where, "recall"),
                             "precision": _number(row.get("precision", ""), where, "precision")})
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(f"{path}: cannot read the tune CSV: {exc}") from exc
    return rows


def tune_svg(rows: list[dict[str, Any]]) -> str:
    """Alarm load against recall, one labelled point per setting."""
    fig = _figure(9.0, 3.4)
    ax = fig.add_subplot()
    for i, row in enumerate(rows, start=1):
        x, y = row["alarms_per_shift"], row["recall"]
        if math.isnan(x) or math.isnan(y):
            continue
        ax.plot([x], [y], "o", color="#3b6ea8")
        ax.annotate(str(i), (x, y), textcoords="offset points", xytext=(5, 4), fontsize=8)
    ax.set_xlabel("alarms per 8-hour shift (site)")
    ax.set_ylabel("recall of labelled faults")
    ax.set_ylim(-0.05, 1.05)
    ax.grid(True, color="#e3e6ea", lw=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    return to_inline_svg(fig, "tune", "Alarm load against recall, one point per setting")


def _cell(value: float, percent: bool = False) -> str:
    if math.isnan(value):
        return "-"
    return f"{100 * value:.0f} %" if percent else f"{value:.3g}"


def tune_context(path: str | Path | None) -> dict[str, Any] | None:
    """What the template shows for ``--tune PATH`` (None without it)."""
    if path is None:
        return None
    from markupsafe import Markup

    rows = read_tune_csv(path)
    labelled = any(not math.isnan(r["recall"]) for r in rows)
    return {"source": str(path), "svg": Markup(tune_svg(rows)) if labelled else None,
            "rows": [{"n": i, "setting": r["setting"], "per_week": _cell(r["alarms_per_feed_week"]),
                      "per_shift": _cell(r["alarms_per_shift"]), "recall": _cell(r["recall"], True),
                      "precision": _cell(r["precision"], True)} for i, r in enumerate(rows, start=1)]}
