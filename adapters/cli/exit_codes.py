"""Exit codes of ``leadline run``, from BSD ``sysexits.h``, and the errors that lead to them.

=====  ===============  ====================================================
code   name             when
=====  ===============  ====================================================
0      EX_OK            stopped by SIGTERM or SIGINT after a clean drain
64     EX_USAGE         bad command-line use (unknown option, missing value)
70     EX_SOFTWARE      an internal error (a bug): a traceback is logged
75     EX_TEMPFAIL      the store or a broker is down at start; try later
78     EX_CONFIG        the config file is missing, unreadable or wrong, or
                        the store holds a schema this build cannot use
=====  ===============  ====================================================

systemd restarts the service on 64, 70 and 75 (``Restart=on-failure``); the
unit's ``RestartPreventExitStatus=78`` stops the restart loop on a bad
config, which no restart can mend. The other commands keep exit status 2
for an error, as before.
"""

from __future__ import annotations

from leadline.detector.errors import ConfigError, SchemaVersionError, SourceError, StoreError

EX_OK = 0
EX_USAGE = 64
EX_SOFTWARE = 70
EX_TEMPFAIL = 75
EX_CONFIG = 78


def exit_code_for(error: BaseException) -> int:
    """The exit status of ``leadline run`` failing at start with ``error``."""
    if isinstance(error, (ConfigError, SchemaVersionError)):
        return EX_CONFIG
    if isinstance(error, (StoreError, SourceError)):
        return EX_TEMPFAIL
    return EX_SOFTWARE


__all__ = ["EX_CONFIG", "EX_OK", "EX_SOFTWARE", "EX_TEMPFAIL", "EX_USAGE", "exit_code_for"]
