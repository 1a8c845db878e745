"""The service's refits: started in the process pool (or inline), collected, installed.

A base class of :class:`~leadline.adapters.service.loop.Service`, kept apart
so that the loop reads as the loop. A finished fit is recorded as a new model
version before the engine swaps it in; with ``refit_install_delay_slots`` it
is installed just before the first reading of its feed at or after the
request's last slot plus that many intervals (deterministic, see
:mod:`.durability`).
"""

from __future__ import annotations

import logging
from concurrent.futures import Future
from datetime import datetime, timezone
from typing import Any

from .log_setup import log_fields

logger = logging.getLogger("leadline.service")


class Refits:
    """Refit handling of the service (see the module docstring)."""

    def _start_fit(self, request: Any) -> None:
        logger.info(log_fields("refit requested", feed=request.feed_id, reason=request.reason,
                               points=len(request.values)))
        if self._pool is None:
            future: Future = Future()
            try:
                future.set_result(self.refit(request))
            except Exception as exc:  # noqa: BLE001 - reported per feed, the service goes on
                future.set_exception(exc)
            self._track(future, request)
            self._collect_fits(block=True)  # inline: installed before the next reading, as a replay does
            return
        else:
            future = self._pool.submit(self.refit, request)
        self._track(future, request)
        if self.refit_install_delay_slots is not None:
            self._install_at[future] = (float(request.epoch_s[-1])
                                        + (self.refit_install_delay_slots + 1) * float(request.interval_s))

    def _track(self, future: Future, request: Any) -> None:
        self._fits[future] = request
        self._fits_of.setdefault(request.feed_id, []).append(future)

    def _install_due(self, feed_id: str, epoch_s: float) -> None:
        """Install (waiting if needed) the feed's fit whose install time ``epoch_s`` has reached.

        Called for every reading: it looks only at the fits of ``feed_id``
        (``_fits_of``), so its cost does not grow with the fits in flight
        elsewhere (thousands while a site's feeds learn together).
        """
        for future in list(self._fits_of.get(feed_id, ())):
            if self._install_at.get(future, -float("inf")) <= epoch_s:
                self._finish_fit(future)

    def _collect_fits(self, block: bool, held: bool = False) -> None:
        """Install finished fits; with an install delay only when ``block`` or ``held`` (the input ended)."""
        if self.refit_install_delay_slots is not None and not (block or held):
            return
        for future in list(self._fits):
            if not (block or future.done()):
                continue
            self._finish_fit(future)

    def _finish_fit(self, future: Future) -> None:
        request = self._fits.pop(future)
        self._install_at.pop(future, None)
        mine = self._fits_of.get(request.feed_id)
        if mine is not None:
            mine.remove(future)
            if not mine:
                del self._fits_of[request.feed_id]
        try:
            fitted, thresholds = future.result()
        except Exception as exc:  # noqa: BLE001 - a failed fit is logged; the feed keeps its old model
            logger.warning(log_fields("refit failed", feed=request.feed_id, reason=request.reason,
                                      error=f"{type(exc).__name__}: {exc}"))
            self._handle(self.engine.refit_failed(request.feed_id, str(exc)))
            return
        self._install(request, fitted, thresholds)

    def _install(self, request: Any, fitted: Any, thresholds: dict) -> None:
        window_start = datetime.fromtimestamp(float(request.epoch_s[0]), tz=timezone.utc)
        window_end = datetime.fromtimestamp(float(request.epoch_s[-1]), tz=timezone.utc)
        version = self.store.record_model(request.feed_id, fitted.spec.label, fitted.params, thresholds,
                                          fitted.summary(), self.clock(), window_start, window_end, request.reason)
        out = self.engine.install_model(request.feed_id, fitted, version, request.reason, thresholds=thresholds,
                                        request=request)
        self.refits_total += 1
        if self.engine.state_of(request.feed_id) == "watching":
            # A new model is made durable with the next commit, not only at the next checkpoint timer,
            # so a crash soon after a fit does not send the feed back to learning.
            self.store.stage_checkpoint(request.feed_id, self.engine.checkpoint(request.feed_id), version)
        logger.info(log_fields("model installed", feed=request.feed_id, version=version, model=fitted.spec.label,
                               reason=request.reason, aicc=fitted.aicc, ljung_box_p=fitted.ljung_box_pvalue,
                               problems="; ".join(fitted.problems) or "none"))
        self._handle(out)
