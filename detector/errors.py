"""The one exception tree of leadline.

Every error that leadline raises on purpose derives from :class:`LeadlineError`.
Adapters translate errors of the libraries they wrap (sqlalchemy, paho-mqtt,
the csv and json modules) into these types at the boundary, with
``raise ... from exc``, so that a caller only ever needs to catch ours.

::

    LeadlineError                (* = also a ValueError)
    ├── SpecError *          a model or seasonality spec that cannot be built
    ├── FitError             statsmodels could not fit the data at all
    ├── DataError *          values or timestamps that cannot be used: not on a
    │                        grid, not numeric, a naive timestamp, an unknown severity
    ├── ParameterError *     an argument of a core call outside its allowed range
    │                        (interval coverage, forecast horizon, level shift)
    ├── StateFormatError *   saved stream state that cannot be loaded
    ├── RuleError *          an alarm rule with impossible parameters
    ├── RejectError *        one bad input record (a CSV row, an MQTT payload)
    ├── ConfigError *        a config file key with a bad value
    ├── StoreError           the event store refused or failed an operation
    │   └── SchemaVersionError   the database schema is unknown or newer
    └── SourceError          a source (file, broker) failed as a whole

The classes marked * also derive from :class:`ValueError`, deliberately:
each is about a value the caller handed in, and ``except ValueError`` is
Python's convention for that (the standard library and numpy raise it for a
bad argument), so code that guards a call that way keeps working, while a
caller that wants only leadline's errors catches :class:`LeadlineError`.
A failed fit, a store and a source fail for reasons other than one bad value
and are not ValueErrors.

Notes
-----
A poor fit is *not* an error: it is reported in ``FittedModel.problems``.
A bad record is a :class:`RejectError`, which a source counts and skips; it
never stops the source.
"""

from __future__ import annotations


class LeadlineError(Exception):
    """Base class of every error leadline raises on purpose."""


class SpecError(LeadlineError, ValueError):
    """A model spec that cannot be built (bad orders, conflicting trend)."""


class FitError(LeadlineError):
    """The data could not be fitted at all (too short, all missing)."""


class DataError(LeadlineError, ValueError):
    """Values or timestamps that cannot be used (unsorted, not numeric, naive)."""


class ParameterError(LeadlineError, ValueError):
    """An argument of a core call outside its allowed range (an interval
    coverage, a forecast horizon, a level shift)."""


class StateFormatError(LeadlineError, ValueError):
    """Saved stream state that is corrupt or of an unknown format version."""


class RuleError(LeadlineError, ValueError):
    """An alarm rule with parameters outside their allowed range."""


class RejectError(LeadlineError, ValueError):
    """One bad input record.

    Parameters
    ----------
    reason : str
        A short, stable reason code used for counting, such as
        ``"non_numeric"`` or ``"bad_time"``.
    detail : str
        A human-readable explanation naming what was expected.
    where : str, optional
        Where the record came from: ``"file.csv:12"`` or an MQTT topic.
    raw : bytes, optional
        The raw record, kept (bounded) as a sample for diagnosis.
    """

    def __init__(self, reason: str, detail: str, where: str = "", raw: bytes | None = None):
        self.reason = reason
        self.detail = detail
        self.where = where
        self.raw = raw
        prefix = f"{where}: " if where else ""
        super().__init__(f"{prefix}{detail} [{reason}]")


class ConfigError(LeadlineError, ValueError):
    """A config file with a missing, unknown or badly valued key."""


class StoreError(LeadlineError):
    """The event store refused or failed an operation."""


class SchemaVersionError(StoreError):
    """The database holds a schema version this build does not know."""


class SourceError(LeadlineError):
    """A source (a followed file, a broker connection) failed as a whole."""
