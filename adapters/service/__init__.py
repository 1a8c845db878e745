"""The service: the loop (:mod:`.loop`) and its wiring from a config (:mod:`.wiring`).

The loop moves readings from the sources through the engine into the
store and to the alarm publisher, typed against the protocols of
:mod:`leadline.adapters.ports`. The wiring builds those parts from a
:class:`~leadline.adapters.config.Config` and runs them with SIGTERM and
SIGINT wired to a clean stop.
"""

from .loop import Service, log_fields
from .wiring import build_service, feed_settings, open_configured_store, run_service

__all__ = ["Service", "build_service", "feed_settings", "log_fields", "open_configured_store", "run_service"]
