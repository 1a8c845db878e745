"""``leadline score`` end to end, and its error messages."""

import csv
import re
import subprocess
import sys

from datetime import datetime, timezone

import numpy as np
import pytest

from leadline.adapters.cli import main
from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from reference import batch_filter


def write_feed(path, values, start=1_780_000_000, step=900, rows=None):
    lines = ["timestamp,value"]
    for i, v in enumerate(values):
        lines.append(f"{start + i * step},{'' if np.isnan(v) else repr(float(v))}")
    if rows:
        lines.extend(rows)
    path.write_text("\n".join(lines) + "\n")


def test_score_writes_the_innovations_of_the_batch_filter(tmp_path):
    y = simulate_arima(400, ar=[0.7], mean=30.0, seed=9)
    y[350] = np.nan
    write_feed(tmp_path / "feed.csv", y)
    out = tmp_path / "scores.csv"
    assert main(["score", str(tmp_path / "feed.csv"), "--train", "300", "--order", "1,0,0",
                 "--out", str(out)]) == 0
    with out.open() as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == 100
    first = datetime.fromtimestamp(1_780_000_000 + 300 * 900, tz=timezone.utc)
    assert datetime.fromisoformat(rows[0]["timestamp"]) == first
    model = fit(y[:300], ModelSpec.ar(1))
    ref = batch_filter(y, model)  # reference: statsmodels batch filter
    z = np.array([float(r["z"]) if r["z"] else np.nan for r in rows])
    np.testing.assert_allclose(z[np.isfinite(z)], ref.standardized_forecasts_error[0, 300:][np.isfinite(z)],
                               rtol=1e-6)
    assert rows[50]["error"] == "" and rows[50]["variance"] != ""
    assert float(rows[0]["lower"]) < float(rows[0]["forecast"]) < float(rows[0]["upper"])


@pytest.mark.parametrize("extra, message", [
    (["1780099999,abc"], "value 'abc' is not a number"),
    (["1780000000,1.0"], "repeats the previous row|earlier than the previous"),
    (["yesterday,1.0"], "neither ISO 8601 nor epoch seconds"),
    (["1780999999,1.0,7"], "expected 2 columns"),
])
def test_bad_rows_are_reported_with_their_line(tmp_path, capsys, extra, message):
    write_feed(tmp_path / "bad.csv", simulate_arima(60, seed=1), rows=extra)
    assert main(["score", str(tmp_path / "bad.csv"), "--train", "30", "--order", "0,0,0"]) == 2
    err = capsys.readouterr().err
    assert "bad.csv:62:" in err
    assert re.search(message, err)


def test_unsorted_rows_name_what_was_expected(tmp_path, capsys):
    write_feed(tmp_path / "u.csv", [1.0, 2.0], rows=["1779990000,3.0"])
    assert main(["score", str(tmp_path / "u.csv"), "--train", "1"]) == 2
    assert "u.csv:4: timestamp '1779990000' is earlier than the previous row; expected rows sorted by time" \
        in capsys.readouterr().err


def test_bundled_example_runs_without_a_traceback():
    # As a user would run it: the console script on the bundled example.
    result = subprocess.run([sys.executable, "-m", "leadline.adapters.cli", "score", "--order", "1,0,1"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[0].startswith("timestamp,value,forecast,error,variance,z,lower,upper,state_spike")
    z = np.array([float(line.split(",")[5]) for line in lines[1:]])
    # The planted spike (invented Cobbleford booster station) stands out.
    assert np.nanmax(np.abs(z)) > 10
    bad = subprocess.run([sys.executable, "-m", "leadline.adapters.cli", "score", "/nonexistent.csv"],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "Traceback" not in bad.stderr and "cannot open" in bad.stderr


def test_score_accepts_calendar_terms(tmp_path):
    epoch = 1_780_000_000 + 900 * np.arange(1200)
    y = 20 + 4 * np.sin(2 * np.pi * epoch / 86400.0) + simulate_arima(1200, ar=[0.5], sigma=0.3, seed=12)
    write_feed(tmp_path / "flow.csv", y)
    out = tmp_path / "s.csv"
    assert main(["score", str(tmp_path / "flow.csv"), "--train", "7d", "--order", "1,0,0",
                 "--seasonality", "1d:2", "--weekend", "--out", str(out)]) == 0
    with out.open() as handle:
        z = np.array([float(r["z"]) for r in csv.DictReader(handle)])
    assert z.size == 1200 - 7 * 96
    # With the daily cycle in the model the held-out z are close to unit variance.
    assert 0.8 < z.std() < 1.2


def test_score_writes_rule_states_and_an_events_file(tmp_path):
    y = simulate_arima(800, ar=[0.6], mean=10.0, sigma=0.2, seed=14)
    y[650] += 3.0  # a 15-sigma spike
    write_feed(tmp_path / "f.csv", y)
    out, events_out = tmp_path / "s.csv", tmp_path / "e.json"
    assert main(["score", str(tmp_path / "f.csv"), "--train", "500", "--order", "1,0,0", "--feed", "ashgrove/level",
                 "--out", str(out), "--events-out", str(events_out)]) == 0
    with out.open() as handle:
        rows = list(csv.DictReader(handle))
    assert {"state_spike", "state_cusum", "state_noise_burst", "state_flatline"} <= set(rows[0])
    assert rows[150]["state_spike"] == "active" and rows[140]["state_spike"] == "normal"
    import json

    document = json.loads(events_out.read_text())
    spikes = [e for e in document["events"] if e["rule"] == "spike"]
    assert len(spikes) == 1
    assert spikes[0]["feed_id"] == "ashgrove/level" and spikes[0]["end"] is not None
    assert datetime.fromisoformat(spikes[0]["start"]).timestamp() == 1_780_000_000 + 650 * 900
    assert spikes[0]["caution"] == document["caution"] and "operator judgment" in document["caution"]
