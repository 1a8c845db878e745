"""``leadline accept`` and the service: an accept note reaches the engine exactly once.

The level shift is planted in a seeded AR(1) feed (the engine tests' feed,
tests/engine_helpers.py) so that the CUSUM rule reports it. The operator's
note goes through the real command into a real SQLite store; the service
reads it, calls the engine's ``accept_level`` and commits the id of the
note it applied with the events, so a restarted service does not apply it
again.
"""

from __future__ import annotations

import logging
from datetime import datetime, timedelta, timezone

import pytest

from engine_helpers import ar1, settings
from leadline.adapters.cli import main
from leadline.adapters.service import Service
from leadline.adapters.service.accepts import MARK
from leadline.adapters.sources.csv_follow import CsvFollower
from leadline.adapters.sources.csv_rows import CsvLayout
from leadline.adapters.store.eventstore import open_store
from leadline.detector.engine import Engine

T0 = datetime(2026, 5, 4, tzinfo=timezone.utc)
FEED = "ashcombe/booster/pt-2"


@pytest.fixture
def shifted_site(tmp_path):
    """A store holding the events of a feed whose level rose by 3 shock sd at slot 900."""
    y = ar1(1100, seed=5)
    y[900:] += 3.0
    path = tmp_path / "pressure.csv"
    path.write_text("timestamp,feed,value\n" + "".join(
        f"{(T0 + timedelta(minutes=i)).isoformat()},{FEED},{float(v)!r}\n" for i, v in enumerate(y)))
    db = tmp_path / "site.db"
    store = open_store(str(db))
    service = Service(engine=Engine(lambda feed: settings()), store=store, refit_workers=0,
                      sources=[CsvFollower("scada", str(path), CsvLayout(), from_start=True)], batch_size=100_000)
    assert service.run(until_idle=lambda: True) == 0
    store.close()
    return db


def restarted(db) -> tuple[Service, object, Engine]:
    store = open_store(str(db))
    engine = Engine(lambda feed: settings())
    for feed_id, (state, version) in store.load_checkpoints().items():
        engine.restore(feed_id, state, version)
    return Service(engine=engine, store=store, sources=[], refit_workers=0), store, engine


def level_event(db) -> int:
    with open_store(str(db)) as store:
        (cusum, *_) = [s for s in store.events() if s.event.rule == "cusum"]
        return cusum.id


def test_accept_refuses_what_is_not_a_level_shift(shifted_site, capsys):
    with open_store(str(shifted_site)) as store:
        assert store.events()  # the fixture's run stored events
        spikes = [s.id for s in store.events() if s.event.rule == "spike"]
    if spikes:
        assert main(["accept", str(spikes[0]), "--db", str(shifted_site), "--by", "operator-r",
                     "--note", "new duty point"]) == 2
        assert "not a level shift" in capsys.readouterr().err
    assert main(["accept", "999999", "--db", str(shifted_site), "--by", "operator-r", "--note", "x"]) == 2
    with pytest.raises(SystemExit):  # --note is required: an accepted level needs its reason
        main(["accept", str(level_event(shifted_site)), "--db", str(shifted_site), "--by", "operator-r"])


class _EngineWithoutAccept:
    """The engine seen through a build that has no ``accept_level`` yet."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    def __getattr__(self, name: str):
        if name == "accept_level":
            raise AttributeError(name)
        return getattr(self._engine, name)


def test_without_accept_level_the_notes_wait_and_say_so(shifted_site, capsys, caplog):
    event_id = level_event(shifted_site)
    assert main(["accept", str(event_id), "--db", str(shifted_site), "--by", "operator-r",
                 "--note", "the new pump runs at a higher head"]) == 0
    assert "Accepted the level of event" in capsys.readouterr().out
    service, store, engine = restarted(shifted_site)
    service.engine = _EngineWithoutAccept(engine)
    with caplog.at_level(logging.ERROR, logger="leadline.service"):
        assert service.run(until_idle=lambda: True) == 0
    assert any("no accept_level" in r.getMessage() for r in caplog.records)
    assert service.accepts.applied == 0
    with open_store(str(shifted_site)) as again:
        assert again.mark(MARK) is None  # still waiting for an engine that can apply it


def test_an_accept_note_is_applied_once_and_not_again_after_a_restart(shifted_site, capsys):
    event_id = level_event(shifted_site)
    assert main(["accept", str(event_id), "--db", str(shifted_site), "--by", "operator-r",
                 "--note", "the new pump runs at a higher head"]) == 0
    with open_store(str(shifted_site)) as store:
        (note_id,) = [n.note_id for n in store.accept_notes_after(0)]
    service, store, _ = restarted(shifted_site)
    assert service.run(until_idle=lambda: True) == 0
    assert service.accepts.applied == 1
    with open_store(str(shifted_site)) as again:
        assert again.mark(MARK) == note_id
    service, store, _ = restarted(shifted_site)
    assert service.run(until_idle=lambda: True) == 0
    assert service.accepts.applied == 0  # the committed mark: not applied twice
