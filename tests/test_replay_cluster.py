"""``leadline replay --scheduler``: a Dask cluster on loopback gives the events of one process."""

from __future__ import annotations

import pytest

from leadline.adapters.cli import main
from leadline.adapters.config.file import load_config
from leadline.adapters.replay.session import history_for, replay_settings, run_replay
from leadline.adapters.replay.summary import final_events
from leadline.adapters.store import open_store
from replay_site import comparable, write_site

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def cluster():
    cluster = distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                       dashboard_address=None)
    yield cluster
    cluster.close()


def test_cluster_events_equal_one_process(tmp_path, cluster, capsys):
    config_path = write_site(tmp_path)
    config = load_config(config_path)
    history = history_for(config)
    settings = replay_settings(config, list(history.feeds))
    one = run_replay(history, settings)
    on_cluster = run_replay(history, settings, workers=2, scheduler=cluster.scheduler_address)
    assert len(on_cluster.results) > 1  # the feeds really went out as several partitions
    assert comparable(on_cluster.events) == comparable(one.events)
    assert on_cluster.summary == one.summary
    # The command line gathers in the client and writes the store there.
    url = f"sqlite:///{tmp_path / 'cluster.db'}"
    assert main(["replay", "--config", str(config_path), "--store", url, "--workers", "2",
                 "--scheduler", cluster.scheduler_address]) == 0
    assert f"events {one.summary.events}" in capsys.readouterr().out
    store = open_store(url)
    try:
        assert {e.event.key for e in store.events()} == set(final_events(one.events))
    finally:
        store.close()
