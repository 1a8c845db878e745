"""``[site]``: the false-alarm budget of a whole site, shared among its feeds.

An operator cares about the alarms of the site, not of one feed: a budget
of 0.2 false alarms per feed per week is 20 a week on a site of 100 feeds.
``[site] false_alarms_per_operator_hour`` states the site's tolerable rate
of false alarms, and each feed's budget (``false_alarms_per_week``, the
default of every feed unless ``[feeds.defaults]`` or an override sets it) is
its share:

.. math::

    \\text{per feed per week} = \\text{site rate per hour} \\times 168 / N

with N = ``expected_feeds``, or the number of feeds the config names (the
``columns.feeds`` of wide CSV sources) when it is not given.

=================================  ========  ==================================================
false_alarms_per_operator_hour     number    the site's false alarms per hour, > 0
expected_feeds                     integer   N (default: the feeds the config names)
=================================  ========  ==================================================

The budget is a rate of false alarms under the fitted models; real faults
come on top (common practice in alarm management: plan the alarm load an
operator can handle and size limits to it).
"""

from __future__ import annotations

from dataclasses import dataclass

from .values import Problems, TableReader, integer, number

SITE_KEYS = ("false_alarms_per_operator_hour", "expected_feeds")
HOURS_PER_WEEK = 168.0


@dataclass(frozen=True)
class SiteConfig:
    """The site's false-alarm budget and the feeds it is shared among."""

    false_alarms_per_operator_hour: float
    feeds: int
    feeds_from: str  # "expected_feeds" or "configured feeds"

    @property
    def per_feed_per_week(self) -> float:
        """Each feed's share: the site rate x 168 / feeds."""
        return self.false_alarms_per_operator_hour * HOURS_PER_WEEK / self.feeds


def read_site(reader: TableReader | None, configured_feeds: int, problems: Problems) -> SiteConfig | None:
    """``[site]``, or None without the table."""
    if reader is None:
        return None
    rate = reader.get("false_alarms_per_operator_hour", number(0, low_open=True), None, required=True)
    expected = reader.get("expected_feeds", integer(1), None)
    if rate is None:
        return None
    if expected is None and configured_feeds < 1:
        problems.error(reader.key("expected_feeds"),
                       "required: the config names no feeds to share the site budget among "
                       "(give the number of feeds the site will have)")
        return None
    if expected is not None:
        return SiteConfig(float(rate), int(expected), "expected_feeds")
    return SiteConfig(float(rate), int(configured_feeds), "configured feeds")


def alarm_load(per_feed_per_week: list[float], shift_hours: float) -> dict[str, float]:
    """The false alarms the budgets imply for the whole site: per hour, per shift and per week."""
    week = float(sum(per_feed_per_week))
    hour = week / HOURS_PER_WEEK
    return {"per_week": week, "per_hour": hour, "per_shift": hour * shift_hours, "shift_hours": shift_hours}
