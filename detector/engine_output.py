"""What the engine hands back: :class:`EngineOutput` and :class:`StateChange`.

They live apart from :mod:`.engine` so that the per-feed lifecycle
(:mod:`.feed`) and the checkpoint format (:mod:`.feed_state`) can build them
without importing the engine; :mod:`.engine` re-exports both.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

from .events import AlarmEvent
from .innovation import Innovation
from .refit import RefitRequest


@dataclass(frozen=True)
class StateChange:
    """A feed moved between lifecycle states (``old == new`` for a model swap or a failed refit).

    ``old`` is ``"new"`` for a feed's first reading and for a restore.
    ``at`` is reading time (the slot that caused it), UTC.
    """

    feed_id: str
    old: str
    new: str
    at: datetime
    detail: str




@dataclass
class EngineOutput:
    """What one call of the engine produced.

    Attributes
    ----------
    events : list of AlarmEvent
        Onsets and clearings (store them; the store upserts on their key).
    state_changes : list of StateChange
    refit_requests : list of RefitRequest
    innovations : list of (feed_id, Innovation)
        Every slot scored, in order (a NaN slot included), for display and replay tools.
    """

    events: list[AlarmEvent] = field(default_factory=list)
    state_changes: list[StateChange] = field(default_factory=list)
    refit_requests: list[RefitRequest] = field(default_factory=list)
    innovations: list[tuple[str, Innovation]] = field(default_factory=list)

    def extend(self, other: "EngineOutput") -> "EngineOutput":
        """Append ``other``'s items to this output; returns self."""
        self.events.extend(other.events)
        self.state_changes.extend(other.state_changes)
        self.refit_requests.extend(other.refit_requests)
        self.innovations.extend(other.innovations)
        return self

    @property
    def is_empty(self) -> bool:
        return not (self.events or self.state_changes or self.refit_requests or self.innovations)

