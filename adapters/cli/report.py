"""``leadline report``: one self-contained HTML page reviewing a shift.

It holds the shift's figures beside reference rates of common practice (see
:mod:`.shift_figures`), an alarm-rate plot, the lists an operator reviews
(feeds with most alarms, repeating, standing and unacknowledged alarms,
shelved and stale feeds), and one panel per incident: a plot of the readings,
the one-step forecast and its interval around the episode (from the stored
evidence), the rules that fired, the model in words, and the
acknowledgements and notes. The caution is shown once, near the top.

The page works offline: plots are inline SVG, styles inline, no scripts,
fonts or images fetched. It needs the ``leadline[report]`` extra
(matplotlib, Jinja2), imported only when the command runs.
"""

from __future__ import annotations

import sys
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from leadline.detector.errors import DataError
from leadline.detector.events import CAUTION

from . import review
from .review import Review, Window, add_store_options, add_window_options, open_review, show_time
from .summary import resolve_report_window, window_title
from .progress import Progress
from .words import show_abs_z
from .shelving import add_include_option
from ..report.figures import (FLOOD_ALARMS, REPEAT_MIN, RATE_BIN, Incident, ShiftData, human_duration, load_figures,
                            model_in_words, plural, reference_rows)

#: Incidents drawn as panels; later ones are listed in one line each.
MAX_PANELS = 60
#: Lines shown per list (unacknowledged alarms, ...); the rest are counted.
MAX_LIST_LINES = 40


def _capped(lines: list[str], hint: str) -> list[str]:
    if len(lines) <= MAX_LIST_LINES:
        return lines
    return lines[:MAX_LIST_LINES] + [f"... and {len(lines) - MAX_LIST_LINES} more ({hint})"]


def _version() -> str:
    try:
        return metadata.version("leadline")
    except metadata.PackageNotFoundError:
        return "(unknown version)"


def merged_evidence(records: list[Any]) -> tuple[np.ndarray, ...] | None:
    """The slots of several records of one feed as one time-ordered series (shared slots once)."""
    records = [r for r in records if r is not None and len(r)]
    if not records:
        return None
    epoch = np.concatenate([r.epoch_s for r in records])
    order = np.argsort(epoch, kind="stable")
    epoch = epoch[order]
    keep = np.concatenate([[True], np.diff(epoch) > 0])
    arrays = [np.concatenate([getattr(r, name) for r in records])[order][keep]
              for name in ("value", "forecast", "lower", "upper")]
    return (epoch[keep], *arrays)


def _when(inc: Incident, rv: Review, until: datetime) -> str:
    start = show_time(inc.start, rv.zone)
    if inc.end is None:
        return (f"{inc.severity.capitalize()} from {start}, still active at the end of the window "
                f"({human_duration((until - inc.start).total_seconds())} by then)")
    return (f"{inc.severity.capitalize()} from {start} to {show_time(inc.end, rv.zone)} "
            f"({human_duration((inc.end - inc.start).total_seconds())})")


def _incident_lines(inc: Incident, data: ShiftData, rv: Review) -> list[str]:
    lines = []
    for s in inc.events:
        ev = s.event
        peak = "" if ev.peak_abs_z != ev.peak_abs_z else f", |z| up to {show_abs_z(ev.peak_abs_z)}"
        end = "active" if ev.end is None else f"cleared {show_time(ev.end, rv.zone)}"
        lines.append(f"#{s.id} {ev.rule} ({ev.severity}{peak}) at {show_time(ev.start, rv.zone)}, {end}: {ev.detail}")
    unit = data.units.get(inc.feed_id)
    seen: set[int | None] = set()
    for s in inc.events:
        v = s.event.model_version
        if v in seen:
            continue
        seen.add(v)
        lines.append("Model: " + model_in_words(data.models.get((inc.feed_id, v)), unit))
    notes = [(s, n) for s in inc.events for n in s.notes]
    if not any(n.kind == "ack" for _, n in notes):
        lines.append("Not acknowledged.")
    for s, n in sorted(notes, key=lambda sn: sn[1].at):
        what = "Acknowledged" if n.kind == "ack" else "Note"
        text = f": {n.text}" if n.text else ""
        lines.append(f"{what} (#{s.id}) by {n.operator} at {show_time(n.at, rv.zone)}{text}")
    return lines


def build_context(data: ShiftData, window: Window, rv: Review, evidence: dict, now: datetime,
                  progress: Any = None, tune_csv: str | None = None) -> dict[str, Any]:
    """Everything the template shows (plots rendered as SVG text); ``progress`` is told of each panel;
    ``tune_csv``: a ``leadline tune`` CSV."""
    from ..report.tune_section import tune_context

    from markupsafe import Markup

    from ..report.plots import incident_svg, rate_svg

    fig = data.figures
    zone = rv.zone
    sev = fig.by_severity
    parts = [f"{sev[s]} {s}" for s in ("alarm", "warning") if sev.get(s)]
    headline = (f"{plural(fig.alarms, 'alarm')} started" + (f" (severity: {', '.join(parts)})" if parts else "")
                + f", in {plural(len(data.incidents), 'incident')} on "
                + f"{plural(len({i.feed_id for i in data.incidents}), 'feed')}.")
    rate = rate_svg("rate", fig.rate_bins, RATE_BIN.total_seconds(), FLOOD_ALARMS, 1.0, zone,
                    "Alarms started per 10 minutes over the window")
    panels = []
    for n, inc in enumerate(data.incidents[:MAX_PANELS], start=1):
        if progress is not None:
            progress.update(n - 1)
        series = merged_evidence([evidence.get(s.event.key) for s in inc.events])
        svg = None
        if series is not None:
            spans = [(s.event.start.timestamp(), None if s.event.end is None else s.event.end.timestamp())
                     for s in inc.events]
            svg = Markup(incident_svg(f"i{n}", *series, spans=spans, onset_s=inc.start.timestamp(), zone=zone,
                                      unit=data.units.get(inc.feed_id),
                                      title=f"{inc.feed_id}: readings and forecast around the incident"))
        panels.append({
            "feed_id": inc.feed_id,
            "rules": ", ".join(inc.rules),
            "severity": inc.severity,
            "when": _when(inc, rv, fig.until),
            "svg": svg,
            "no_plot": "No readings were stored with this incident (the store keeps them from schema version 3 on).",
            "lines": _incident_lines(inc, data, rv),
        })
    more = [f"{inc.feed_id}: {', '.join(inc.rules)} from {show_time(inc.start, zone)} "
            f"(#{', #'.join(str(s.id) for s in inc.events)})" for inc in data.incidents[MAX_PANELS:]]
    floods = [f"{show_time(f.start, zone)} to {show_time(f.end, zone)}: {plural(f.alarms, 'alarm')} in "
              f"{human_duration((f.end - f.start).total_seconds())}" for f in fig.floods]
    lists = [
        {"title": "Repeating alarms", "lines": _capped([f"{r.feed_id} {r.rule}: {plural(r.episodes, 'episode')}"
                                                        for r in fig.repeating], "the most repeated first")},
        {"title": "Standing alarms (active more than 24 h)", "lines": [
            f"#{s.id} {s.event.feed_id} {s.event.rule} since {show_time(s.event.start, zone)} "
            f"({human_duration((fig.until - s.event.start).total_seconds())} at the end)" for s in fig.standing]},
        {"title": f"Unacknowledged alarms ({len(fig.unacked)})", "lines": _capped([
            f"#{s.id} {s.event.feed_id} {s.event.rule} {s.event.severity} at {show_time(s.event.start, zone)}"
            for s in fig.unacked], "leadline events --unacked lists them all")},
        {"title": "Shelved feeds", "lines": [
            f"{n.feed_id} until {show_time(n.expires_at, zone)} by {n.operator}: {n.text}" for n in fig.shelved]},
        {"title": "Stale feeds", "lines": list(fig.stale_feeds)},
    ]
    title = (f"Shift report: {window.shift.name} shift of {window.shift.local_date.isoformat()}"
             if window.shift is not None else "Alarm report")
    return {
        "title": title,
        "subtitle": window_title(window, rv),
        "figures_heading": "The shift in figures" if window.shift is not None else "The window in figures",
        "value_heading": "This shift" if window.shift is not None else "This window",
        "store_url": data.store_url,
        "zone_name": rv.zone_name,
        "generated": show_time(now, zone),
        "caution": CAUTION,
        "headline": headline,
        "reference": reference_rows(fig),
        "rate_svg": Markup(rate),
        "floods": floods,
        "top_feeds": [{"feed_id": f.feed_id, "alarms": f.alarms, "share": f"{100 * f.share:.0f} %"}
                      for f in fig.top_feeds],
        "lists": lists,
        "incidents": panels,
        "more_incidents": more,
        "version": _version(),
        "flood_alarms": FLOOD_ALARMS,
        "repeat_min": REPEAT_MIN,
        "tune": tune_context(tune_csv),
    }


def render_report(data: ShiftData, window: Window, rv: Review, evidence: dict, now: datetime,
                  progress: Any = None, tune_csv: str | None = None) -> str:
    """The HTML page."""
    from ..report.plots import require_report_libraries

    require_report_libraries()
    import jinja2

    from ..report.template import PAGE

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    return env.from_string(PAGE).render(**build_context(data, window, rv, evidence, now, progress, tune_csv))


def default_path(window: Window) -> Path:
    if window.shift is not None:
        return Path(f"leadline-report-{window.shift.local_date.isoformat()}-{window.shift.name}.html")
    return Path(f"leadline-report-{window.since.astimezone(timezone.utc):%Y%m%dT%H%MZ}.html")


def run_report(args, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    from ..report.plots import require_report_libraries

    require_report_libraries()
    now = review.utc_now()
    with open_review(args) as rv:
        window = resolve_report_window(args, rv, now)
        data = load_figures(rv.store, window.since, window.until, include_shelved=args.include_shelved)
        keys = [s.event.key for inc in data.incidents[:MAX_PANELS] for s in inc.events]
        evidence = rv.store.evidence(keys)
        drawing = Progress(out, "drawing incident panels", min(len(data.incidents), MAX_PANELS), after_s=1.0)
        html = render_report(data, window, rv, evidence, now, drawing, getattr(args, "tune", None))
        drawing.finish(min(len(data.incidents), MAX_PANELS))
    path = Path(args.out) if args.out else default_path(window)
    try:
        path.write_text(html, encoding="utf-8")
    except OSError as exc:
        raise DataError(f"--out {path}: cannot write the report ({exc.strerror or exc})") from exc
    print(f"Wrote {path} ({len(html.encode('utf-8')) / 1024:.0f} KB): {plural(data.figures.alarms, 'alarm')}, "
          f"{plural(len(data.incidents), 'incident')}. Open it in any browser; it needs no network.", file=out)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "report", help="write a shift's review as one self-contained HTML file",
        description="Write one HTML file (no network needed to open it) reviewing a shift or time window: the "
                    "alarm figures beside common reference rates, an alarm-rate plot, and one panel per incident "
                    "with its readings, forecast and notes. Needs the leadline[report] extra. Alarms are advisory.")
    add_store_options(p)
    add_window_options(p, None)
    add_include_option(p)
    p.add_argument("--out", metavar="FILE", help="the HTML file to write (default: leadline-report-<shift>.html)")
    p.add_argument("--tune", metavar="CSV", help="add the settings tried: a CSV written by leadline tune --csv")
    p.set_defaults(handler=run_report)
