"""The sd_notify protocol, without a systemd library: READY=1, WATCHDOG=1, STATUS=, STOPPING=1.

With ``Type=notify`` systemd passes the path of a datagram socket in
``$NOTIFY_SOCKET``; a service reports its state by sending newline-separated
``KEY=VALUE`` assignments to it (sd_notify(3)). A path starting with ``@``
names a socket in Linux's abstract namespace (the ``@`` stands for a leading
NUL byte). With ``WatchdogSec=`` systemd also sets ``$WATCHDOG_USEC`` (and
``$WATCHDOG_PID``); the service must then send ``WATCHDOG=1`` more often than
that, or it is killed and restarted; sd_watchdog_enabled(3) advises every
half interval, which :class:`Notifier` does. Without ``$NOTIFY_SOCKET``
(not under systemd, or ``Type=simple``) every call does nothing.
"""

from __future__ import annotations

import logging
import os
import socket
import time
from typing import Mapping

from ..sinks.safe_text import safe_text

logger = logging.getLogger("leadline.sd_notify")


def send(message: str, environ: Mapping[str, str] | None = None) -> bool:
    """Send ``message`` to ``$NOTIFY_SOCKET``; False when there is none or it cannot be reached."""
    path = (os.environ if environ is None else environ).get("NOTIFY_SOCKET", "")
    if not path or path[0] not in "/@":
        return False
    address = "\0" + path[1:] if path[0] == "@" else path
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
            sock.sendto(message.encode("utf-8"), address)
    except OSError as exc:
        logger.debug("sd_notify to %s failed: %s", path, exc)
        return False
    return True


def watchdog_interval_s(environ: Mapping[str, str] | None = None) -> float | None:
    """Seconds between ``WATCHDOG=1`` messages (half of ``$WATCHDOG_USEC``); None without a watchdog."""
    env = os.environ if environ is None else environ
    try:
        usec = int(env.get("WATCHDOG_USEC", ""))
    except ValueError:
        return None
    pid = env.get("WATCHDOG_PID")
    if usec <= 0 or (pid and pid != str(os.getpid())):
        return None
    return usec / 2e6


class Notifier:
    """The service's link to systemd: ready once, watchdog pings, one-line status.

    Parameters
    ----------
    environ : mapping, optional
        Where ``NOTIFY_SOCKET`` and ``WATCHDOG_USEC`` are read (default: the
        process environment, read once here).
    clock : callable
        Monotonic seconds.
    """

    def __init__(self, environ: Mapping[str, str] | None = None, clock=time.monotonic) -> None:
        env = dict(os.environ if environ is None else environ)
        self._env = {k: env[k] for k in ("NOTIFY_SOCKET",) if k in env}
        self.watchdog_s = watchdog_interval_s(env)
        self._clock = clock
        self._last_ping = float("-inf")

    @property
    def enabled(self) -> bool:
        return bool(self._env.get("NOTIFY_SOCKET"))

    def ready(self, status: str = "") -> bool:
        return send("READY=1" + (f"\nSTATUS={_one_line(status)}" if status else ""), self._env)

    def status(self, text: str) -> bool:
        return send(f"STATUS={_one_line(text)}", self._env)

    def stopping(self, status: str = "") -> bool:
        return send("STOPPING=1" + (f"\nSTATUS={_one_line(status)}" if status else ""), self._env)

    def heartbeat(self) -> bool:
        """Send ``WATCHDOG=1`` when half the watchdog interval has passed; True when sent."""
        if self.watchdog_s is None:
            return False
        now = self._clock()
        if now - self._last_ping < self.watchdog_s:
            return False
        self._last_ping = now
        return send("WATCHDOG=1", self._env)


def _one_line(text: str) -> str:
    return safe_text(" ".join(str(text).split()))


__all__ = ["Notifier", "send", "watchdog_interval_s"]
