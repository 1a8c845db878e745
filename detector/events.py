"""Alarm events: what the rules emit and the store keeps.

One alarm episode of one rule on one feed gives exactly one :class:`AlarmEvent`.
It is emitted when the episode starts (``end`` is None) and emitted again,
with the same ``(feed_id, rule, start)`` key, when it clears. The store
upserts on that key, so a replayed reading can never duplicate an event.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import datetime
from typing import Any

from .errors import DataError

#: The same text is attached to every event, every listing and every export.
CAUTION = (
    "Advisory only: leadline alarms support, and never replace, operator judgment. "
    "They are not a safety function; safety functions belong to certified safety "
    "systems under the site's own codes and licensed practice."
)

SEVERITIES = ("warning", "alarm")


@dataclass(frozen=True, slots=True)
class AlarmEvent:
    """One alarm episode.

    Attributes
    ----------
    feed_id : str
    rule : str
        The rule's name: ``"spike"``, ``"cusum"``, ``"ewma"``, ``"flatline"``,
        ``"noise_burst"``, ``"stale"``, ``"range"``, ``"meter_reset"``.
    severity : str
        ``"warning"`` or ``"alarm"``: the highest severity reached.
    start : datetime
        UTC, timezone-aware: the time of the reading that activated the rule.
    end : datetime or None
        UTC time the rule returned to normal; None while active.
    peak_abs_z : float
        The largest |z_t| seen during the episode (NaN where no z applies).
    value_at_onset, forecast_at_onset : float
        The reading and the model's one-step forecast at ``start``.
    lower_at_onset, upper_at_onset : float
        The forecast interval at ``start``.
    parameters : dict
        The rule's parameters (limits, k, h, window), JSON-serialisable.
    model_version : int or None
        The model version that scored the onset reading.
    detail : str
        One line a person can read: what the rule saw.
    incident_start : datetime or None
        The start of the incident this episode belongs to
        (:mod:`leadline.detector.incidents`); None before it is grouped.
    caution : str
        Always :data:`CAUTION`.

    Raises
    ------
    DataError
        When ``severity`` is not one of :data:`SEVERITIES`, or ``start`` or
        ``end`` is not a timezone-aware datetime.
    """

    feed_id: str
    rule: str
    severity: str
    start: datetime
    end: datetime | None = None
    peak_abs_z: float = float("nan")
    value_at_onset: float = float("nan")
    forecast_at_onset: float = float("nan")
    lower_at_onset: float = float("nan")
    upper_at_onset: float = float("nan")
    parameters: dict[str, Any] = field(default_factory=dict)
    model_version: int | None = None
    detail: str = ""
    incident_start: datetime | None = None
    caution: str = CAUTION

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise DataError(
                f"AlarmEvent for {self.feed_id!r}: severity must be one of {SEVERITIES}, got {self.severity!r}"
            )
        if getattr(self.start, "tzinfo", None) is None:
            raise DataError(f"AlarmEvent for {self.feed_id!r}: start must be a timezone-aware datetime (UTC)")
        if self.end is not None and getattr(self.end, "tzinfo", None) is None:
            raise DataError(f"AlarmEvent for {self.feed_id!r}: end must be a timezone-aware datetime (UTC) or None")
        if self.incident_start is not None and getattr(self.incident_start, "tzinfo", None) is None:
            raise DataError(f"AlarmEvent for {self.feed_id!r}: incident_start must be a timezone-aware datetime "
                            "(UTC) or None")

    @property
    def key(self) -> tuple[str, str, datetime]:
        """The identity of the episode: ``(feed_id, rule, start)``."""
        return (self.feed_id, self.rule, self.start)

    @property
    def is_active(self) -> bool:
        return self.end is None

    def cleared(self, end: datetime, **changes: Any) -> "AlarmEvent":
        """The same episode, closed at ``end``."""
        return replace(self, end=end, **changes)
