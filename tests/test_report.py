"""``leadline report`` on a small hand-built store: one self-contained HTML file."""

from __future__ import annotations

import re
import sys
from collections import Counter
from datetime import timezone

import pytest

from leadline.adapters.cli import main
from leadline.detector.events import CAUTION

from shift_site import REPEAT_FEED, shift_site  # noqa: F401 - fixture

UTC = timezone.utc

#: Markup that would make a browser fetch something: elements that load, and CSS that imports.
FETCHING = [
    re.compile(r"""\b(?:src|href|srcset|poster|data|action)\s*=\s*["']?\s*(?:https?:)?//""", re.I),
    re.compile(r"""url\(\s*["']?\s*(?:https?:)?//""", re.I),
    re.compile(r"@import", re.I),
    re.compile(r"<(?:script|link|iframe|object|embed|img)\b", re.I),
]
#: The only URLs allowed: XML namespace names, which identify and are never fetched.
NAMESPACE = re.compile(r'xmlns(?::\w+)?="http://www\.w3\.org/(?:2000/svg|1999/xlink)"')


@pytest.fixture
def report(shift_site, tmp_path):
    out = tmp_path / "night.html"
    assert main(["report", "--shift", "last", "--config", str(shift_site.config), "--out", str(out)]) == 0
    return shift_site, out.read_text(encoding="utf-8")


def test_the_report_fetches_nothing(report):
    _, html = report
    for pattern in FETCHING:
        assert not pattern.search(html), pattern.pattern
    stripped = NAMESPACE.sub("", html)
    assert not re.search(r"https?://", stripped), re.search(r".{40}https?://.{40}", stripped).group(0)
    assert html.startswith("<!DOCTYPE html>") and html.rstrip().endswith("</html>")


def test_ids_are_unique_across_the_inline_plots(report):
    _, html = report
    ids = Counter(re.findall(r'\bid="([^"]+)"', html))
    assert ids and not [i for i, n in ids.items() if n > 1]
    # every reference to an id points to one that exists
    refs = set(re.findall(r'href="#([^"]+)"', html)) | set(re.findall(r"url\(#([^)]+)\)", html))
    assert refs <= set(ids)


def test_one_panel_per_incident_with_a_plot_where_readings_were_stored(report):
    site, html = report
    panels = re.findall(r'<article class="incident (\w+)" id="incident-(\d+)">(.*?)</article>', html, re.S)
    assert len(panels) == 11  # six flood feeds (two overlapping spikes each), three repeats, one ack, one stale
    with_plot = [body for _, _, body in panels if "<svg" in body]
    # evidence was stored for flood_0 (dm-01), repeat_0, repeat_1 and the acknowledged level alarm
    assert len(with_plot) == 4
    assert sum("No readings were stored with this incident" in body for _, _, body in panels) == 7
    level = next(body for _, _, body in panels if "tarnbeck/reservoir/level" in body)
    assert "Acknowledged (#" in level and "by B. Operator at 2026-03-14 04:20 GMT: valve checked" in level
    assert "<!-- m -->" in level  # the unit on the y axis (matplotlib keeps each text as a comment)
    repeat = next(body for _, _, body in panels if REPEAT_FEED in body)
    assert "<!-- L/s -->" in repeat
    assert "ARMA(1,1) + const (model version 2)" in repeat and "a 1-day cycle with 3 harmonics" in repeat
    assert "Not acknowledged." in repeat


def test_figures_caution_and_lists(report):
    _, html = report
    assert html.count(CAUTION.replace("'", "&#39;")) == 1
    row = re.search(r"<td>Most alarms in any 10 minutes</td><td class=\"num\">(\d+)</td>.*?</tr>", html, re.S)
    assert row.group(1) == "12" and 'class="above"' in row.group(0)
    assert "2026-03-13 22:00 GMT to 2026-03-13 22:10 GMT: 12 alarms in 10 min" in html
    assert "Unacknowledged alarms (16)" in html
    assert "Shift report: night shift of 2026-03-13" in html
    assert 'aria-label="Alarms started per 10 minutes over the window"' in html


def test_a_missing_plotting_library_names_the_extra(shift_site, tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib now raises ImportError
    out = tmp_path / "r.html"
    assert main(["report", "--shift", "last", "--config", str(shift_site.config), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "leadline[report]" in err and "matplotlib" in err
    assert not out.exists()


def test_an_empty_window_still_makes_a_page(shift_site, tmp_path):
    out = tmp_path / "quiet.html"
    assert main(["report", "--since", "2026-03-14T07:00Z", "--until", "2026-03-14T08:00Z",
                 "--config", str(shift_site.config), "--out", str(out)]) == 0
    html = out.read_text(encoding="utf-8")
    assert "0 alarms started, in 0 incidents on 0 feeds." in html
    assert "No incidents in this window." in html


def test_long_lists_are_cut_with_a_count():
    from leadline.adapters.cli.report import MAX_LIST_LINES, _capped

    lines = [f"#{i}" for i in range(MAX_LIST_LINES + 5)]
    cut = _capped(lines, "see leadline events")
    assert cut[:-1] == lines[:MAX_LIST_LINES] and cut[-1] == "... and 5 more (see leadline events)"
    assert _capped(lines[:3], "x") == lines[:3]
