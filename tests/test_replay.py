"""``leadline replay``: the same events as the live service over the same CSV, in one process or many."""

from __future__ import annotations

import math

import pytest

from leadline.adapters.cli import main
from leadline.adapters.config.file import load_config
from leadline.adapters.replay.parallel import make_groups
from leadline.adapters.replay.session import history_for, replay_settings, run_replay
from leadline.adapters.replay.summary import final_events
from leadline.adapters.service.wiring import build_service
from leadline.adapters.store import open_store
from replay_site import FEEDS, N, SPIKE_AT, START, STEP, comparable, write_site


def stored(url: str) -> dict[tuple, tuple]:
    store = open_store(url)
    try:
        return {(e.event.feed_id, e.event.rule, e.event.start): (e.event.end, e.event.severity, peak(e.event),
                                                                 e.event.model_version)
                for e in store.events()}
    finally:
        store.close()


def peak(event) -> float | None:
    return None if math.isnan(event.peak_abs_z) else round(event.peak_abs_z, 9)


def models(url: str) -> dict[str, list[tuple]]:
    store = open_store(url)
    try:
        return {f: [(m.version, m.reason, m.window_start, m.window_end) for m in store.models(f)] for f in FEEDS}
    finally:
        store.close()


def live_run(config_path) -> str:
    """``leadline run --replay`` over the same CSV, in this process, stopped once the files are read."""
    config = load_config(config_path)
    service = build_service(config, from_start=True, replay=True, refit_workers=0)
    try:
        service.run(until_idle=lambda: True)
    finally:
        service.store.close()
    return config.store.url


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    folder = tmp_path_factory.mktemp("quillmoor")
    config_path = write_site(folder)
    return folder, config_path


def test_replay_equals_the_live_service(tmp_path, capsys):
    # One file in reading order: the live service then sees the readings in the replay's order.
    config_path = write_site(tmp_path, files=1)
    assert main(["replay", "--config", str(config_path)]) == 0
    out = capsys.readouterr().out
    assert f"readings {N * len(FEEDS)}" in out
    replay_url = f"sqlite:///{tmp_path / 'replay.db'}"  # a store of its own, beside the config
    replayed = stored(replay_url)
    live_url = live_run(config_path)
    assert live_url != replay_url
    assert replayed == stored(live_url)
    # Every planted wild reading is found, at its own time (the faults are outside the project's code).
    for feed in FEEDS:
        assert (feed, "spike", START + SPIKE_AT[feed] * STEP) in replayed
    # Scheduled refits every day of reading time: the same models, in the same windows.
    replay_models = models(replay_url)
    assert replay_models == models(live_url)
    assert all(sum(m[1] == "scheduled refit" for m in replay_models[f]) >= 3 for f in FEEDS)


def test_a_folder_of_files_is_replayed_in_reading_order(site, tmp_path):
    # Two files of two feeds each give the events of one file of all four: replay merges on time.
    _, config_path = site
    one_file = write_site(tmp_path, files=1)
    events = {}
    for path in (config_path, one_file):
        config = load_config(path)
        history = history_for(config)
        events[path] = final_events(run_replay(history, replay_settings(config, list(history.feeds))).events)
    assert comparable(events[config_path].values()) == comparable(events[one_file].values())
    assert events[config_path]


def test_workers_give_the_events_of_one_process(site):
    _, config_path = site
    config = load_config(config_path)
    history = history_for(config)
    settings = replay_settings(config, list(history.feeds))
    one = run_replay(history, settings, workers=1)
    two = run_replay(history, settings, workers=2)
    assert len(two.results) > 1
    assert comparable(one.events) == comparable(two.events)
    assert one.summary == two.summary


def test_groups_are_dealt_the_same_every_run():
    feeds = [f"f{i}" for i in range(10)]
    assert make_groups(feeds, 3) == make_groups(list(reversed(feeds)), 3)
    assert sorted(sum(make_groups(feeds, 3), [])) == sorted(feeds)
    assert len(make_groups(feeds, 20)) == 10


def test_from_and_until_cut_the_history(site):
    _, config_path = site
    config = load_config(config_path)
    start, end = START + 10 * STEP, START + 110 * STEP
    history = history_for(config, start=start, end=end)
    assert history.readings == 100 * len(FEEDS)
    assert all(h.epoch_s.min() == start.timestamp() for h in history.feeds.values())


def test_a_time_without_offset_is_refused(site, capsys):
    _, config_path = site
    assert main(["replay", "--config", str(config_path), "--from", "2026-04-06T00:00:00"]) == 2
    assert "no UTC offset" in capsys.readouterr().err




def test_progress_is_plain_lines_when_not_a_terminal():
    import io
    from types import SimpleNamespace

    from leadline.adapters.cli.replay import Progress

    stream = io.StringIO()
    progress = Progress(3, 300, stream=stream)
    progress.within(100)
    progress(SimpleNamespace(feeds=["a", "b"], readings=200))
    progress(SimpleNamespace(feeds=["c"], readings=100))
    lines = stream.getvalue().splitlines()
    assert [line.split(",")[0:2] for line in lines] == [["replay: 0/3 feeds", " 100/300 readings"],
                                                       ["replay: 2/3 feeds", " 200/300 readings"],
                                                       ["replay: 3/3 feeds", " 300/300 readings"]]
    assert "\r" not in stream.getvalue()
