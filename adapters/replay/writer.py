"""Write the gathered results of a replay to a store, in group order.

Models are recorded per feed in the order they were fitted; the store gives
each its version, and the events' ``model_version`` is mapped from the
replay's own numbering (1, 2, ... per feed) to the store's. Events are
staged in the order the engine gave them, so an episode's closing event
overwrites its opening one under the store's key (start, feed, rule), as
in the service.
"""

from __future__ import annotations

import dataclasses
from typing import Iterable

from .runner import GroupResult

__all__ = ["write_results"]


def write_results(store, results: Iterable[GroupResult]) -> None:
    """Record models, stage events and evidence, and flush (see the module's docstring)."""
    for result in results:
        versions: dict[tuple[str, int], int] = {}
        for m in result.models:
            versions[(m.feed_id, m.local_version)] = store.record_model(
                m.feed_id, m.order, m.parameters, m.thresholds, m.fit_stats, m.fitted_at, m.window_start,
                m.window_end, m.reason)
        for event in result.events:
            if event.model_version is not None:
                mapped = versions.get((event.feed_id, event.model_version), event.model_version)
                if mapped != event.model_version:
                    event = dataclasses.replace(event, model_version=mapped)
            store.stage_event(event)
        for record in result.evidence:
            if getattr(record, "model_version", None) is not None:
                mapped = versions.get((record.feed_id, record.model_version), record.model_version)
                if mapped != record.model_version:
                    record = dataclasses.replace(record, model_version=mapped)
            store.stage_evidence(record)
        store.flush()
