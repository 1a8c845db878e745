"""One reading of one feed, as every source hands it to the engine.

A source (a followed CSV file, an MQTT subscription) turns its raw input into
:class:`Reading` objects. ``origin`` says where the reading came from so that
the source can later be acknowledged up to that point, once the effects of
the reading are durable in the store.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

from .errors import DataError


@dataclass(frozen=True, slots=True)
class Reading:
    """A single timestamped value of one feed.

    Attributes
    ----------
    feed_id : str
        The feed's identifier, for example ``"northgate/flow/dm-03"``.
    timestamp : datetime
        Timezone-aware, in UTC.
    value : float
        The reading; ``nan`` marks a slot that was reported empty
        (counted as missing, not as bad).
    origin : Any
        An opaque position token of the source that produced it (a file
        offset, an MQTT message id). Only that source interprets it.
    timestamp_from_arrival : bool
        True when the payload carried no time and the arrival time was used.

    Raises
    ------
    DataError
        When ``timestamp`` is not a timezone-aware datetime.
    """

    feed_id: str
    timestamp: datetime
    value: float
    origin: Any = None
    timestamp_from_arrival: bool = False

    def __post_init__(self) -> None:
        try:
            tzinfo = self.timestamp.tzinfo
        except AttributeError:
            raise DataError(
                f"Reading for {self.feed_id!r}: timestamp must be a timezone-aware datetime, "
                f"got {type(self.timestamp).__name__}"
            ) from None
        if tzinfo is timezone.utc:
            return  # the common case, kept cheap for the sources' fast paths
        if tzinfo is None:
            raise DataError(f"Reading for {self.feed_id!r}: timestamp must be timezone-aware")
        if self.timestamp.utcoffset() != timezone.utc.utcoffset(None):
            object.__setattr__(self, "timestamp", self.timestamp.astimezone(timezone.utc))

    @property
    def is_missing(self) -> bool:
        """True for an empty slot (``value`` is NaN)."""
        return math.isnan(self.value)
