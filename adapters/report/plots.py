"""The report's plots as inline SVG text (matplotlib, no pyplot, no files).

matplotlib is imported lazily, so the service and the other commands never
need it; without it :func:`require_report_libraries` raises a
:class:`ConfigError` naming the ``leadline[report]`` extra. Text is drawn as
paths (matplotlib's default ``svg.fonttype``), so the SVG needs no font.
Every id in one SVG gets a prefix of its own, so several SVGs can share one
HTML page without their clip paths or glyphs colliding.
"""

from __future__ import annotations

import io
import re
from datetime import datetime, timezone, tzinfo
from typing import Any, Sequence

import numpy as np

from leadline.detector.errors import ConfigError

EXTRA_HINT = ("leadline report needs matplotlib and Jinja2, which are not installed here: "
              "install the report extra, for example  pip install 'leadline[report]'  "
              "(or  pip install -e '.[report]'  in a checkout)")

# Plain, readable colours of our own: readings dark, forecast and band blue-grey, the alarm span amber.
READING = "#1f2a36"
FORECAST = "#4a6f94"
BAND = "#c9d7e6"
SPAN = "#f6e1b8"
ONSET = "#b4451f"
BARS = "#4a6f94"
FLOOD_LINE = "#b4451f"
REFERENCE_LINE = "#6b8e4e"

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def require_report_libraries() -> None:
    """Raise :class:`ConfigError` naming the extra when matplotlib or Jinja2 is missing."""
    try:
        import jinja2  # noqa: F401
        import matplotlib  # noqa: F401
    except ImportError as exc:
        raise ConfigError(f"{EXTRA_HINT} ({exc})") from exc


def _figure(width_in: float, height_in: float) -> Any:
    require_report_libraries()
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=100, layout="constrained")
    return fig


def _date_numbers(epoch_s: np.ndarray) -> np.ndarray:
    from matplotlib import dates as mdates

    return mdates.date2num(_EPOCH) + np.asarray(epoch_s, dtype=float) / 86400.0


def _time_axis(ax: Any, zone: tzinfo) -> None:
    from matplotlib import dates as mdates

    locator = mdates.AutoDateLocator(tz=zone, minticks=4, maxticks=9)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=zone))


_ID = re.compile(r'\bid="([^"]+)"')


def to_inline_svg(fig: Any, prefix: str, title: str) -> str:
    """The figure as an ``<svg>`` element for an HTML page (ids prefixed, no XML prologue or metadata)."""
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    text = buffer.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    ids = set(_ID.findall(text))
    if ids:
        names = "|".join(re.escape(i) for i in sorted(ids, key=len, reverse=True))
        text = re.sub(rf'\bid="({names})"', lambda m: f'id="{prefix}-{m.group(1)}"', text)
        text = re.sub(rf'(href=")#({names})"', lambda m: f'{m.group(1)}#{prefix}-{m.group(2)}"', text)
        text = re.sub(rf"url\(#({names})\)", lambda m: f"url(#{prefix}-{m.group(1)})", text)
    # scale with the page: drop the fixed size, keep the viewBox
    text = re.sub(r'<svg([^>]*?)\s+width="[^"]*"\s+height="[^"]*"', r"<svg\1", text, count=1)
    return text.replace("<svg", f'<svg role="img" aria-label="{_attr(title)}"', 1)


def _attr(text: str) -> str:
    return text.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;")


def incident_svg(prefix: str, epoch_s: np.ndarray, value: np.ndarray, forecast: np.ndarray, lower: np.ndarray,
                 upper: np.ndarray, spans: Sequence[tuple[float, float | None]], onset_s: float,
                 zone: tzinfo, unit: str | None, title: str) -> str:
    """Readings, one-step forecast and band; the alarm spans shaded, the onset marked.

    ``spans`` are ``(start_s, end_s)`` pairs, ``end_s`` None while active (shaded to the last slot).
    """
    fig = _figure(9.0, 3.0)
    ax = fig.add_subplot()
    x = _date_numbers(epoch_s)
    last = max(float(epoch_s[-1]) if len(epoch_s) else onset_s, onset_s)
    for i, (a, b) in enumerate(spans):
        b = b if b is not None else last  # still active: shade to the last slot
        ax.axvspan(*_date_numbers(np.array([a, max(b, a)])), color=SPAN, lw=0,
                   label="alarm active" if i == 0 else None)
    ax.fill_between(x, lower, upper, color=BAND, lw=0, label="forecast interval")
    ax.plot(x, forecast, color=FORECAST, lw=1.2, ls="--", label="one-step forecast")
    ax.plot(x, value, color=READING, lw=1.3, label="reading")
    ax.axvline(_date_numbers(np.array([onset_s]))[0], color=ONSET, lw=1.4, label="onset")
    ax.set_ylabel(unit if unit else "reading")
    _time_axis(ax, zone)
    ax.grid(True, color="#e3e6ea", lw=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), fontsize=8, frameon=False, ncols=5)
    ax.margins(x=0.01, y=0.12)
    return to_inline_svg(fig, prefix, title)


def rate_svg(prefix: str, bins: Sequence[tuple[datetime, int]], bin_s: float, flood_alarms: int,
             reference_per_bin: float, zone: tzinfo, title: str) -> str:
    """Alarms started per bin over the window, with the flood limit and the reference rate."""
    fig = _figure(9.0, 2.6)
    ax = fig.add_subplot()
    starts = np.array([(b - _EPOCH).total_seconds() for b, _ in bins])
    counts = np.array([c for _, c in bins], dtype=float)
    x = _date_numbers(starts)
    ax.bar(x, counts, width=bin_s / 86400.0, align="edge", color=BARS, lw=0, label="alarms per 10 minutes")
    ax.axhline(flood_alarms, color=FLOOD_LINE, lw=1.2, ls="--", label=f"flood: more than {flood_alarms}")
    ax.axhline(reference_per_bin, color=REFERENCE_LINE, lw=1.2, ls=":",
               label=f"about {reference_per_bin:g} acceptable (common practice)")
    ax.set_ylabel("alarms")
    ax.set_ylim(0, max(flood_alarms + 2, float(counts.max(initial=0)) * 1.15))
    if len(x):
        ax.set_xlim(x[0], x[-1] + bin_s / 86400.0)
    _time_axis(ax, zone)
    ax.grid(True, axis="y", color="#e3e6ea", lw=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), fontsize=8, frameon=False, ncols=3)
    return to_inline_svg(fig, prefix, title)
