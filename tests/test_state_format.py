"""Saved stream state: round trip, and clear refusals of bad bytes."""

import struct

import numpy as np
import pytest

from leadline.detector.errors import StateFormatError
from leadline.detector.fitting import fit
from leadline.detector.simulate import simulate_arima
from leadline.detector.spec import ModelSpec
from leadline.detector.stream import STATE_FORMAT_VERSION, Stream


@pytest.fixture(scope="module")
def stream():
    model = fit(simulate_arima(300, ar=[0.5], mean=2.0, seed=4), ModelSpec.ar(1))
    s = model.stream(model_version=7)
    s.shift_level(0.25)
    return s


def test_round_trip_keeps_everything(stream):
    back = Stream.from_bytes(stream.to_bytes())
    assert back.model_version == 7 and back.step == stream.step and back.level_offset == 0.25
    np.testing.assert_array_equal(back.state, stream.state)
    np.testing.assert_array_equal(back.cov, stream.cov)
    assert back.meta["label"] == "AR(1) + const"
    assert back.peek(2.0).forecast == stream.peek(2.0).forecast


def test_bad_bytes_are_refused(stream):
    data = stream.to_bytes()
    with pytest.raises(StateFormatError, match="bad magic"):
        Stream.from_bytes(b"not a state at all")
    newer = data[:8] + struct.pack("<H", STATE_FORMAT_VERSION + 1) + data[10:]
    with pytest.raises(StateFormatError, match=f"format version {STATE_FORMAT_VERSION + 1} is not supported"):
        Stream.from_bytes(newer)
    with pytest.raises(StateFormatError, match="corrupt"):
        Stream.from_bytes(data[:-40])
    with pytest.raises(StateFormatError, match="corrupt.*bytes after the last array"):
        Stream.from_bytes(data + b"\0" * 8)


def test_a_stream_state_of_format_1_still_loads(stream):
    # format 1: the same JSON header, then an .npz archive of the arrays
    import io
    import json

    body = io.BytesIO()
    np.savez(body, state=stream.state, cov=stream.cov, **stream.system.to_arrays())
    header = json.loads(stream.to_bytes()[14:14 + struct.unpack_from("<I", stream.to_bytes(), 10)[0]])
    header.pop("$arrays")
    header_bytes = json.dumps({**header, "format_version": 1}).encode()
    old = b"LLSTREAM" + struct.pack("<HI", 1, len(header_bytes)) + header_bytes + body.getvalue()
    back = Stream.from_bytes(old)
    assert back.to_bytes() == stream.to_bytes()
    assert len(stream.to_bytes()) < len(old) / 3  # raw arrays, no zip and .npy headers


# ------------------------------------------------- checkpoints of the first layout
def test_a_checkpoint_of_the_first_layout_resumes_like_an_uninterrupted_run():
    # tests/data/checkpoint_first_layout.bin was written by the first checkpoint layout (the rules'
    # state saved as the objects' attributes), for the engine tests' feed cut at slot 601, inside
    # the spike episode of slot 600. It must resume with its rule states, as a run that never stopped.
    # That run's events and z (tests/data/checkpoint_first_layout_expected.json) were recorded with
    # the build that wrote the checkpoint: today's fits differ slightly, so a run started afresh
    # now would not be the run the checkpoint was cut from.
    import json
    from datetime import datetime, timedelta, timezone
    from pathlib import Path

    from engine_helpers import ar1, settings
    from leadline.detector.engine import Engine, EngineOutput, run_refit
    from leadline.detector.readings import Reading

    feed = "kestrel-hill/bulk/meter-2"
    t0 = datetime(2024, 5, 6, tzinfo=timezone.utc)
    y = ar1(1100, seed=5)
    y[600] += 10.0
    y[900:] += 3.0

    def drive(engine, start):
        out = EngineOutput()
        for i in range(start, len(y)):
            step = engine.process(Reading(feed, t0 + timedelta(minutes=i), float(y[i])))
            out.extend(step)
            for request in step.refit_requests:
                out.extend(engine.install_model(feed, run_refit(request), 1, request.reason))
        return out

    data = Path(__file__).parent / "data"
    whole = json.loads((data / "checkpoint_first_layout_expected.json").read_text(encoding="utf-8"))
    resumed = Engine(lambda feed_id: settings())
    resumed.restore(feed, (data / "checkpoint_first_layout.bin").read_bytes(), 1)
    out = drive(resumed, 601)
    assert "rule states restored" in out.state_changes[0].detail
    # The recorded run cleared the level-shift episode of slot 900 at 15:32 while the step still ran
    # (to slot 1100): an alarm now lasts as long as the readings stay away from the level before the
    # episode, so that clearing is no longer expected; every other event is.
    expected = [event for event in whole["events"] if not (event[0] == "cusum" and event[2] is not None)]
    assert [[ev.rule, ev.start.isoformat(), None if ev.end is None else ev.end.isoformat(), ev.severity]
            for ev in out.events] == expected
    assert out.events[-1].rule == "cusum" and out.events[-1].end is None
    assert out.events[0].rule == "spike" and out.events[0].start == t0 + timedelta(minutes=600)  # the saved episode
    z_whole = np.array([np.nan if z is None else z for z in whole["z_from_slot_601"]])
    z_resumed = np.array([inn.z for _, inn in out.innovations])
    np.testing.assert_allclose(z_resumed, z_whole, rtol=1e-7, atol=1e-9)
