"""Words and numbers of the review output: plurals, values, |z|, counters, progress lines."""

from __future__ import annotations

import io

import numpy as np

from leadline.adapters.cli.progress import Progress
from leadline.adapters.cli.words import counter_words, plural, show_abs_z, show_value, times
from leadline.detector.engine import Engine

from engine_helpers import ar1, settings
from test_engine_state import at, drive, register


def test_plurals():
    assert [plural(1, "alarm event"), plural(2, "alarm event"), plural(0, "feed"), times(1), times(3)] == [
        "1 alarm event", "2 alarm events", "0 feeds", "1 time", "3 times"]
    assert plural(12_288, "reading") == "12,288 readings"


def test_abs_z_is_a_number_capped_at_99():
    assert show_abs_z(19_700.0) == "> 99" and "e+" not in show_abs_z(1.97e4)
    assert [show_abs_z(-5.24), show_abs_z(99.0), show_abs_z(float("nan")), show_abs_z(None)] == [
        "5.2", "99.0", "-", "-"]


def test_values_to_the_resolution_or_4_significant_figures():
    # 4 significant figures (common practice for a reading on a screen)
    assert [show_value(12.345678), show_value(0.000123456), show_value(-3.5), show_value(41.0)] == [
        "12.35", "0.0001235", "-3.5", "41"]
    assert show_value(123456.7) == "123457"  # whole numbers are not cut to 1.235e+05
    assert [show_value(41.26, 0.5), show_value(4.2499, 0.01), show_value(7.0, 1.0)] == ["41.5", "4.25", "7"]
    assert show_value(float("nan")) == "-"


def test_a_counter_is_told_in_words():
    text = counter_words({"delta": 190, "rollover": 1, "reset": 0, "missing": 0, "first": 1, "meter_resets": 0})
    assert text == "190 interval deltas, 1 register rollover (handled, not an alarm), no meter reset"
    assert "{" not in text


def test_a_counter_feed_events_speak_of_the_interval_delta():
    size = 1e6
    deltas = ar1(699, seed=33, phi=0.5, mean=20.0, sd=2.0)
    deltas[600] += 60.0  # a burst of use: 30 sd in one interval
    readings = register(deltas, 1000.0, size)
    engine = Engine(lambda feed_id: settings(counter=True, register_size=size))
    out, _ = drive(engine, readings)
    spikes = [e for e in out.events if e.rule == "spike"]
    assert spikes and spikes[0].start == at(601)
    assert spikes[0].detail.startswith("interval delta ") and "reading" not in spikes[0].detail.split(" is ")[0]


class _Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_is_plain_lines_off_a_terminal_and_one_rewritten_line_on_one():
    now = [0.0]
    plain = io.StringIO()
    p = Progress(plain, "replaying", 1000, "readings", clock=lambda: now[0], after_s=1.0)
    p.update(10)  # quick work stays quiet
    for t in np.arange(1.0, 4.0, 0.25):
        now[0] = float(t)
        p.update(int(t * 100))
    p.finish(1000)
    lines = plain.getvalue().splitlines()
    assert lines[0] == "replaying: 100 of 1,000 readings [1 s]" and len(lines) == 4  # 1, 2, 3 s, then done
    assert lines[-1].startswith("replaying: 1,000 of 1,000 readings") and "\r" not in plain.getvalue()

    tty = _Tty()
    now[0] = 0.0
    q = Progress(tty, "drawing incident panels", 3, clock=lambda: now[0])
    for n in range(3):
        now[0] += 0.5
        q.update(n)
    q.finish(3)
    text = tty.getvalue()
    assert text.count("\r") == 4 and text.endswith("drawing incident panels: 3 of 3 [2 s]\n")
    assert text.count("\n") == 1
