"""What a FeedMonitor watches (MonitorConfig) and what one reading gives (StepResult)."""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field

from ..events import AlarmEvent
from ..innovation import Innovation
from .lifecycle import LifecycleConfig
from .limits import AlarmLimits
from .stale import DEFAULT_STALE_INTERVALS
from .thresholds import sigma_thresholds


@dataclass
class MonitorConfig:
    """What to watch on one feed.

    Parameters
    ----------
    thresholds : AlarmLimits
        Limits from :func:`~.thresholds.budget_thresholds` or
        :func:`~.thresholds.sigma_thresholds` (default: sigma mode
        defaults); their JSON form is read too.
    interval_s : float or None
        Nominal reading interval; enables the ``stale`` rule.
    stale_intervals : float
        Silence, in nominal intervals, before ``stale`` is raised (the
        config key of the same name).
    range_low, range_high : float or None
        The engineering range; both None disables the ``range`` rule.
    flatline_tolerance, flatline_resolution : float
        See :class:`~.flatline.FlatlineRule`; the resolution used is the larger
        of this and the one stored in the thresholds.
    lifecycles : dict of str to LifecycleConfig
        On-delay and off-delay per rule; missing names take the defaults.
    insulate_outliers : bool
        Score wild readings with ``absorb=False`` (see the module docstring).
    insulation_abs_z : float or None
        |z| from which a reading is not absorbed; None: the spike warning
        limit. While a spike episode is open no reading is absorbed either.
    shock_abs_z : float or None
        The shock view (see :meth:`FeedMonitor._shock_view`) takes a reading
        as following a process shock when its |z| in that view is below
        this; None turns the shock view off.
    reanchor : bool
        Re-anchor the forecasts after a CUSUM-confirmed level shift.
    confirmations : int
        CUSUM signals in the same direction, within one open CUSUM episode,
        needed before the forecasts are re-anchored (>= 1). A false signal
        is rarely followed by another one soon; a real shift keeps
        signalling. Re-anchoring on a false signal would create the very
        offset it reports, and the next signal would move the level back.
    settle_steps : int
        Readings after a re-anchoring from which the new level is estimated
        again, and corrected; 0 disables the correction.
    rules : tuple of str or None
        The innovation rules to run (default: all configured ones).
    """

    thresholds: AlarmLimits = field(default_factory=sigma_thresholds)
    interval_s: float | None = None
    stale_intervals: float = DEFAULT_STALE_INTERVALS
    range_low: float | None = None
    range_high: float | None = None
    flatline_tolerance: float = 0.0
    flatline_resolution: float = 0.0
    lifecycles: dict[str, LifecycleConfig] = field(default_factory=dict)
    insulate_outliers: bool = True
    insulation_abs_z: float | None = None
    shock_abs_z: float | None = 2.0
    reanchor: bool = True
    confirmations: int = 2
    settle_steps: int = 24
    rules: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        self.thresholds = AlarmLimits.of(self.thresholds)

    def fingerprint(self) -> str:
        """The configuration as one canonical JSON text, to tell whether saved rule states fit it.

        The text keeps the key names of the first checkpoints (the limits
        as their JSON form, ``stale_intervals`` under its earlier name
        ``stale_missing_intervals``), so checkpoints written before the
        rename still match.
        """
        data = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        data["thresholds"] = self.thresholds.to_json()
        data["lifecycles"] = {name: life.to_dict() for name, life in self.lifecycles.items()}
        data["stale_missing_intervals"] = data.pop("stale_intervals")
        return json.dumps(data, sort_keys=True, default=repr)


@dataclass(frozen=True)
class StepResult:
    """What one :meth:`FeedMonitor.process` call did.

    Iterating it gives its events.

    Attributes
    ----------
    events : list of AlarmEvent
        Onset and clearing events of this step (usually empty).
    innovation : Innovation
        The step's innovation as the rules saw it (the shock view where it
        applied), with the reading's timestamp.
    reanchored : bool
        The forecasts were moved to a new level in this step.
    level_offset : float
        The stream's level offset after the step.
    episodes_open : bool
        Some rule has an open episode after the step.
    """

    events: list[AlarmEvent]
    innovation: Innovation
    reanchored: bool
    level_offset: float
    episodes_open: bool

    def __iter__(self):
        return iter(self.events)

    def __len__(self) -> int:
        return len(self.events)
