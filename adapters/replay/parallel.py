"""Run the replay of feed groups in this process, a process pool, or on a Dask cluster.

Feeds are independent in the engine, so a replay partitions by feed: the
feeds are dealt to groups (sorted by id, then round-robin, so every run
makes the same groups), each group is one call of
:func:`~.runner.replay_group`, and the results come back to the caller,
which writes them to the store (:mod:`.writer`). Whatever runs the groups,
the events are the same: each group's refits run inline, in its worker.

* ``workers <= 1`` and no scheduler: one process, one group.
* ``workers = N``: a spawn-context process pool of N workers, one BLAS
  thread each (nested BLAS threads made fits several times slower), 4N groups.
* ``scheduler="tcp://host:port"``: a Dask ``distributed`` client (the
  ``cluster`` extra); one task per group, each group's histories shipped
  as the task's partition, results gathered in the client.
"""

from __future__ import annotations

import multiprocessing
from concurrent.futures import ProcessPoolExecutor
from typing import Any, Callable, Mapping, Sequence

from leadline.detector.engine import FeedSettings
from leadline.detector.errors import ConfigError

from .history import FeedHistory
from .runner import GroupResult, replay_group, single_blas_thread

__all__ = ["make_groups", "run_groups"]


def make_groups(feed_ids: Sequence[str], groups: int) -> list[list[str]]:
    """Feeds dealt round-robin to at most ``groups`` groups, by sorted id (the same every run)."""
    ordered = sorted(feed_ids)
    n = max(1, min(int(groups), len(ordered)))
    return [ordered[i::n] for i in range(n) if ordered[i::n]]


def _group_task(feeds: list[FeedHistory], settings: dict[str, FeedSettings]) -> GroupResult:
    single_blas_thread()
    return replay_group(feeds, settings)


def run_groups(histories: Mapping[str, FeedHistory], settings: Mapping[str, FeedSettings], *,
               workers: int = 1, scheduler: str | None = None, groups_per_worker: int = 4,
               on_done: Callable[[GroupResult], None] | None = None,
               on_progress: Callable[[int], None] | None = None) -> list[GroupResult]:
    """Replay every feed of ``histories``; the results in group order (see the module's docstring).

    ``on_done(result)`` is called as each group finishes; in one process
    ``on_progress(readings)`` also every 100,000 readings (progress).
    """
    done = on_done or (lambda result: None)
    if scheduler is None and workers <= 1:
        result = replay_group([histories[f] for f in sorted(histories)], settings, on_progress=on_progress)
        done(result)
        return [result]
    n_workers = max(1, workers)
    groups = make_groups(list(histories), n_workers * groups_per_worker)
    payloads = [([histories[f] for f in group], {f: settings[f] for f in group}) for group in groups]
    if scheduler is not None:
        return _run_dask(scheduler, payloads, done)
    single_blas_thread()
    results: list[GroupResult | None] = [None] * len(payloads)
    with ProcessPoolExecutor(max_workers=n_workers, mp_context=multiprocessing.get_context("spawn")) as pool:
        futures = {pool.submit(_group_task, *payload): i for i, payload in enumerate(payloads)}
        from concurrent.futures import as_completed

        for future in as_completed(futures):
            result = future.result()
            results[futures[future]] = result
            done(result)
    return [r for r in results if r is not None]


def _run_dask(scheduler: str, payloads: list[tuple[list[FeedHistory], dict[str, FeedSettings]]],
              done: Callable[[GroupResult], None]) -> list[GroupResult]:
    try:
        from distributed import Client, as_completed
    except ImportError as exc:
        raise ConfigError("--scheduler needs Dask: pip install 'leadline[cluster]'") from exc
    try:
        client = Client(scheduler, timeout="30s")
    except (OSError, TimeoutError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {scheduler}: {exc}") from exc
    try:
        futures = [client.submit(_group_task, feeds, settings, pure=False) for feeds, settings in payloads]
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[Any] = [None] * len(futures)
        for future in as_completed(futures):
            result = future.result()
            results[index[future.key]] = result
            done(result)
        return results
    finally:
        client.close()
